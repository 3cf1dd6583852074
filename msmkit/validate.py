"""Validation of Markov models: the Chapman–Kolmogorov test, the lag-flow view, VAMP-2 scores and
cross-validation of model choices.

The Chapman–Kolmogorov test asks whether the model at lag tau predicts the data at longer lags:
for sets of states A and B, the probability to be in B a time k tau after being in A, predicted
by T(tau)^k, is compared with the same probability estimated directly from the data at lag
k tau. The lag flow draws the same numbers for two sets as a path in the plane of their
self-transition probabilities. VAMP-2 measures how much slow dynamics a model's singular
functions capture; scored on held-out runs it compares numbers of microstates.

References
----------
Prinz et al., J. Chem. Phys. 134, 174105 (2011), Sec. IV.D: the Chapman–Kolmogorov test.
Efron, Ann. Stat. 7, 1 (1979): the bootstrap.
Wu & Noe, J. Nonlinear Sci. 30, 23 (2020): VAMP scores, VAMP-2.
McGibbon & Pande, J. Chem. Phys. 142, 124105 (2015): variational cross-validation of model choices.
"""
from __future__ import annotations

import numbers
import warnings
from dataclasses import dataclass, field

import numpy as np
import scipy.linalg as la

from ._bootstrap import (fit_sample, percentile_interval, progress_bar, resampling_plan, sample_rows,
                         unflatten)
from ._checks import (brief, as_float_trajectories, as_label_trajectories, as_state_set, check_bool, check_dt,
                      check_int, check_probability, check_seed, check_unit)
from ._execution import map_sample_batches, place
from .counts import count_csr, run_count_rows
from .defaults import CK_MULTIPLES, CK_SAMPLES
from .errors import DiagnosticWarning, InputError
from .model import MarkovModel, build_model, fingerprint
from .posterior import check_uncertainty, posterior_at_lag
from .spectral import FEW_CROSSINGS, slow_crossings

__all__ = [
    "CKResult",
    "CrossValidation",
    "LagFlow",
    "chapman_kolmogorov",
    "cross_validate",
    "lag_flow",
    "vamp2_score",
    "vamp2_score_on",
]

#: a pair's interval counts only when at least this share of the bootstrap samples gave a value
MIN_VALID_SHARE = 0.8
#: predictions this close to the estimate are equal (k = 1 compares a model with itself)
_SAME = 1e-9
#: default number of lag multiples of the lag flow (fewer when the data do not reach that far)
FLOW_MULTIPLES = 10
#: default number of slow processes scored in cross-validation (fewer for very small models)
CV_PROCESSES = 5


# =============================================================================================
# Chapman–Kolmogorov test
# =============================================================================================

@dataclass(eq=False)
class CKResult:
    """Result of :func:`chapman_kolmogorov`.

    Arrays indexed ``[k - 1, a, b]`` hold the probability to be in set b a time k tau after
    being in set a (start: the model's stationary weights inside set a).

    Attributes
    ----------
    members : list of ndarray of int
        Original labels of the states of each set.
    multiples : ndarray of int, shape (K,)
        k = 1..K.
    lag : int
        The model's lag tau in frames.
    dt : float
    unit : str
    predicted : ndarray, shape (K, m, m)
        From powers of the model's transition matrix, T(tau)^k.
    estimated : ndarray, shape (K, m, m)
        From models estimated from the data at lag k tau (NaN where set a has no state in the
        connected set at that lag).
    lower, upper : ndarray, shape (K, m, m)
        Percentile bootstrap interval, or equal-tailed posterior credible interval
        (:attr:`uncertainty`), of ``estimated`` (NaN without samples).
    deviation : ndarray, shape (K, m, m)
        (predicted - estimated) in units of the standard error of the estimate (the standard
        deviation of the samples); NaN where no interval was usable.
    within : ndarray of bool, shape (K, m, m)
        The prediction passes: the deviation stays below :attr:`threshold` (the family-wise
        limit over all compared points), or within ``tolerance`` where no interval was usable.
    outside_interval : ndarray of bool, shape (K, m, m)
        The prediction lies outside the pointwise percentile interval of the estimate. About
        ``1 - confidence`` of the points do so by chance even for a Markovian model, so this
        alone is not a failure.
    used_tolerance : ndarray of bool, shape (K, m, m)
        Pairs judged by ``tolerance`` because the data were too few for an interval (no
        bootstrap, fewer than 80 % of the samples giving a value, or all samples equal).
    outside_by : ndarray, shape (K, m, m)
        How far a failing prediction lies beyond the family-wise band
        ``estimated +- threshold x standard error`` (or beyond the tolerance), as a probability;
        0 where it passes, NaN where nothing could be estimated.
    threshold : float
        Family-wise limit on ``|deviation|``: the two-sided quantile of Student's t (n_samples - 1
        degrees of freedom) at ``(1 - confidence) / n_compared`` (Bonferroni; the failing points
        are found with Holm's step-down procedure, which gives the same verdict).
    n_compared : int
        Points judged against an interval (k >= 2 and the prediction not identical with the
        estimate).
    set_populations : ndarray, shape (m,)
        Stationary probability of each set in the model (the limit of every row as k grows).
    samples : ndarray, shape (K, n_samples, m, m)
        Bootstrap or posterior estimates.
    uncertainty : str
        "bootstrap" or "bayes" (:func:`chapman_kolmogorov`).
    predicted_lower, predicted_upper : ndarray, shape (K, m, m)
        With ``uncertainty="bayes"``: equal-tailed credible interval of ``predicted`` from
        powers of posterior samples of the model's transition matrix; NaN otherwise.
    confidence, tolerance : float
    n_samples : int
    verdict : str
        "passed", "failed", or "inconclusive" (the data hold too few changes between the sets,
        or too few crossings of the slowest process, to test the model).
    passed : bool
        Summary of :attr:`verdict`: True only for "passed". Read :attr:`n_failed`,
        :attr:`deviation` and :meth:`table` for how many points miss and by how much.
    criterion : str
        The verdict and the rule behind it, in words.
    notes : list of str
        How the sets and intervals were obtained; states lost at longer lags.
    """

    members: list
    multiples: np.ndarray
    lag: int
    dt: float
    unit: str
    predicted: np.ndarray
    estimated: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    within: np.ndarray
    used_tolerance: np.ndarray
    outside_by: np.ndarray
    set_populations: np.ndarray
    samples: np.ndarray = field(repr=False)
    confidence: float = 0.95
    tolerance: float = 0.05
    n_samples: int = 0
    passed: bool = False
    criterion: str = ""
    notes: list = field(default_factory=list)
    deviation: np.ndarray | None = None
    outside_interval: np.ndarray | None = None
    threshold: float = np.nan
    n_compared: int = 0
    verdict: str = ""
    uncertainty: str = "bootstrap"
    predicted_lower: np.ndarray | None = None
    predicted_upper: np.ndarray | None = None

    def __post_init__(self):
        for name in ("predicted_lower", "predicted_upper"):
            if getattr(self, name) is None:
                setattr(self, name, np.full_like(np.asarray(self.predicted, dtype=float), np.nan))

    @property
    def n_sets(self) -> int:
        return len(self.members)

    @property
    def n_failed(self) -> int:
        """How many predictions fail (beyond the family-wise threshold or the tolerance, or not
        estimable)."""
        return int((~self.within).sum())

    @property
    def estimate_outside(self) -> np.ndarray:
        """Where the estimate lies outside the bootstrap interval of the same point (bool, shape (K, m, m)):
        the resampled values are skewed or too few, so that interval does not describe the
        estimate's uncertainty."""
        with np.errstate(invalid="ignore"):
            return np.isfinite(self.estimated) & ((self.estimated < self.lower - 1e-12)
                                                  | (self.estimated > self.upper + 1e-12))

    @property
    def lag_times(self) -> np.ndarray:
        """k tau in physical time (``multiples * lag * dt``, in :attr:`unit`)."""
        return self.multiples * self.lag * self.dt

    def table(self):
        """One row per (from set, to set, k).

        Columns: ``from_set``, ``to_set``, ``k``, ``lag`` (frames), ``lag_time`` (in
        ``df.attrs['unit']``), ``predicted``, ``estimated``, ``lower``, ``upper`` (probabilities),
        ``deviation`` (predicted - estimated in bootstrap standard errors), ``within`` (passes
        the family-wise criterion), ``outside_interval`` (outside the pointwise interval),
        ``used_tolerance`` (bool), ``outside_by`` (how far a failing prediction misses, 0 when it
        passes), ``estimate_outside`` (the estimate lies outside the interval of the same row),
        ``predicted_lower``, ``predicted_upper`` (credible interval of the prediction; NaN with the
        bootstrap). ``df.attrs`` also holds ``threshold``, ``n_compared``, ``uncertainty`` and
        ``confidence``.
        """
        import pandas as pd
        K, m, _ = self.predicted.shape
        k, a, b = np.meshgrid(self.multiples, np.arange(m), np.arange(m), indexing="ij")
        df = pd.DataFrame({
            "from_set": a.ravel(), "to_set": b.ravel(), "k": k.ravel(),
            "lag": k.ravel() * self.lag, "lag_time": k.ravel() * self.lag * self.dt,
            "predicted": self.predicted.ravel(), "estimated": self.estimated.ravel(),
            "lower": self.lower.ravel(), "upper": self.upper.ravel(),
            "deviation": self.deviation.ravel(), "within": self.within.ravel(),
            "outside_interval": self.outside_interval.ravel(), "used_tolerance": self.used_tolerance.ravel(),
            "outside_by": self.outside_by.ravel(), "estimate_outside": self.estimate_outside.ravel(),
            "predicted_lower": self.predicted_lower.ravel(), "predicted_upper": self.predicted_upper.ravel(),
        }).sort_values(["from_set", "to_set", "k"], kind="stable").reset_index(drop=True)
        df.attrs.update(unit=self.unit, threshold=self.threshold, n_compared=self.n_compared,
                        uncertainty=self.uncertainty, confidence=self.confidence)
        return df


def chapman_kolmogorov(model, labels, *, n_sets=None, sets=None, multiples=CK_MULTIPLES, n_samples=CK_SAMPLES, seed=None,
                       confidence=0.95, tolerance=0.05, uncertainty="bootstrap", progress=False, client=None,
                       cancel=None) -> CKResult:
    """Chapman–Kolmogorov test: does T(tau)^k predict the data at lag k tau?

    For each pair of sets (a, b) and k = 1..``multiples``, compares

    * predicted: p0_a T(tau)^k 1_b, with p0_a the model's stationary distribution restricted to
      set a and normalized, 1_b the indicator of set b;
    * estimated: p0_a T(k tau) 1_b, with T(k tau) estimated from ``labels`` at lag k tau on the
      model's kept states (the largest connected set among them at that lag; same estimator,
      reversible or not, and same counting as the model). States lost at the longer lag are
      left out of both the start distribution and the targets (said in ``notes``).

    At k = 1 the estimate is the model itself, so predicted and estimated agree exactly when
    ``labels`` are the data the model was built from.

    Parameters
    ----------
    model : MarkovModel
        The model at lag tau.
    labels : array_like of int, or list of them
        Label trajectories (normally those the model was built from).
    n_sets : int, optional
        Number of PCCA+ macrostates to test (>= 2). Default: ``model.suggest_n_macrostates()``
        (at least 2). Ignored when ``sets`` is given.
    sets : list of lists of int, optional
        Your own disjoint sets of states, by original label (need not cover every state).
    multiples : int, default 4 (``msmkit.defaults.CK_MULTIPLES``)
        Largest k; k tau must stay shorter than the longest run.
    n_samples : int, default 20
        Samples for the intervals of the estimates (see ``uncertainty``); bootstrap: whole runs
        are resampled with replacement (contiguous blocks when there are fewer than 5 runs).
        0: no interval, every pair is judged by ``tolerance``.
    seed : int, optional
        Seeds the resampling or the posterior sampler.
    confidence : float, default 0.95
        Coverage of the percentile intervals.
    tolerance : float, default 0.05
        Largest absolute difference accepted where the data are too few for an interval.
    uncertainty : {"bootstrap", "bayes"}, default "bootstrap"
        Where the samples come from. "bootstrap": resampled runs. "bayes": at each lag k tau,
        draws from the posterior of reversible transition matrices given the data's counts
        there (on the states of the estimate, sliding-window counts divided by the lag;
        :func:`msmkit.posterior.posterior_at_lag`), and equal-tailed credible intervals; the
        predictions also get credible intervals (``predicted_lower``, ``predicted_upper``) from
        powers of posterior samples of the model's own counts. The verdict uses the spread of
        the estimates in both cases (see Notes). Needs a reversible model.
    progress : bool
        Show a progress bar.
    client : dask.distributed.Client, optional
        Count the runs and fit the bootstrap samples on the cluster's workers, batches of
        samples as tasks (needs the extra ``dask``); the same seed gives the same samples and
        the same result as in memory. With ``uncertainty="bayes"`` the runs are counted on the
        cluster and the posterior is sampled in this process.
    cancel : object with ``is_set()``, optional
        E.g. a ``threading.Event`` set from another thread: asked between units of work (a lag
        multiple, a bootstrap sample); once set, :class:`~msmkit.errors.Cancelled` is raised.

    Returns
    -------
    CKResult
        ``.verdict``, ``.passed`` (a summary of it), ``.n_failed``, ``.deviation``, ``.criterion`` (in
        words), ``.table()``.

    Notes
    -----
    Macrostates are used as crisp sets: each state belongs to the macrostate of largest
    PCCA+ membership. Crisp sets let the data side count transitions between sets directly;
    membership-weighted probabilities would mix states that the data never saw together.
    Every compared point (k >= 2) gets a deviation, (predicted - estimated) in units of the
    bootstrap standard error of the estimate. Judged one at a time at ``confidence``, about
    1 - ``confidence`` of the points of a Markovian model would miss by chance, and with m^2 K
    points nearly every test would fail somewhere; the verdict therefore holds the family-wise
    error at 1 - ``confidence``: a point fails when Holm's step-down procedure rejects it (some
    point does exactly when the largest deviation exceeds the Bonferroni threshold, the quantile
    of Student's t with n_samples - 1 degrees of freedom at (1 - confidence) / (2 n)). Pairs without a usable interval are held to
    ``tolerance``. The standard errors cover the sampling error of the estimates only, not that
    of the model, which makes the test conservative for Markovian data. The verdict is
    "inconclusive" when the data change between the sets, or cross the slowest process, fewer
    than 20 times at the model's lag. Read the number of failing points, the deviations and the
    figure, not only the verdict.

    With ``uncertainty="bayes"`` the same rule is applied to the posterior standard deviations of
    the estimates. Measured (10 runs; Markov data: a 20-state chain with 4 sets at lag 5, 30
    replicates; lumped data: the observed two sets of a hidden four-state chain, 20-30
    replicates): false alarms 0 of 30 with either method; lumped data failed at lags 1-10 in
    every replicate with either method, at lag 20 in 4 of 20 with the bootstrap and 0 of 20
    with the posterior. The posterior of sliding-window counts divided by the lag is wider than
    the sampling error at long lags (posterior standard deviation over the spread of the
    estimates across 40 replicates of a 3-state chain, 10 runs x 1000 frames: 0.97-1.01 at lags
    1-4, 0.99-1.14 at lags 3-12, 1.08-1.52 at lags 10-40; the bootstrap's 0.88-0.96), so the
    bayes verdict is the more conservative one at long lags.

    References
    ----------
    Prinz et al., J. Chem. Phys. 134, 174105 (2011), Sec. IV.D.

    Examples
    --------
    >>> import numpy as np
    >>> from msmkit import build_model
    >>> rng = np.random.default_rng(1)
    >>> runs = [rng.integers(0, 2, 500) for _ in range(6)]   # independent frames: Markovian
    >>> model = build_model(runs, lag=1)
    >>> ck = chapman_kolmogorov(model, runs, multiples=3, n_samples=10, seed=0)
    >>> ck.passed, ck.table().shape
    (True, (12, 17))
    """
    model = _check_model(model)
    runs = as_label_trajectories(labels)
    multiples = check_int(multiples, "multiples", minimum=1)
    n_samples = check_int(n_samples, "n_samples", minimum=0)
    confidence = check_probability(confidence, "confidence")
    tolerance = check_probability(tolerance, "tolerance")
    seed = check_seed(seed)
    bayes = check_uncertainty(uncertainty, model.reversible) == "bayes"
    _check_reach(runs, model, multiples)
    notes = []
    sets, how = _resolve_sets(model, sets, n_sets)
    notes.append(how)
    m = len(sets)
    n_kept = model.n_states
    M = np.zeros((n_kept, m))
    for j, s in enumerate(sets):
        M[model.index_of(s, f"sets[{j}]"), j] = 1.0
    pi = model.equilibrium
    populations = pi @ M

    # predicted: p0 T^k for k = 1..K
    K = multiples
    P0 = _start_rows(pi, M)
    predicted = np.empty((K, m, m))
    P = P0
    for k in range(K):
        P = P @ model.propagator
        predicted[k] = P @ M

    sha = model.metadata.get("labels_sha256")
    if sha is not None and sha != fingerprint(runs):
        text = ("labels are not the trajectories this model was built from (their fingerprint differs); "
                "the test compares the model with these data, and at k = 1 the two need not agree.")
        notes.append(text)
        warnings.warn(text, DiagnosticWarning, stacklevel=2)

    rng = np.random.default_rng(seed)
    blocks, weights, plan_notes = resampling_plan(len(runs), 0 if bayes else n_samples, rng)
    notes += plan_notes
    chain_seeds = rng.integers(0, 2 ** 63, size=K + 1) if bayes else None
    n_lab = max(max((int(r.max()) for r in runs if r.size), default=-1), int(model.states.max())) + 1
    every_frame = bool(model.metadata.get("parameters", {}).get("every_frame", True))
    estimated = np.full((K, m, m), np.nan)
    samples = np.full((K, n_samples, m, m), np.nan)
    lost = []
    support_counts = None
    placed = place(runs, client)  # label arrays sent to the workers once, for every multiple of the lag
    bar = progress_bar(K * (1 + n_samples) + (n_samples if bayes else 0), progress, "Chapman–Kolmogorov test",
                       cancel)
    pred_lower = pred_upper = None
    try:
        if bayes and n_samples:
            draws = _posterior_powers(model, K, n_samples, every_frame, chain_seeds[K], M, bar)
            pred_lower, pred_upper = percentile_interval(draws, confidence, axis=1)
            notes.append(f"Intervals: equal-tailed {100 * confidence:g}% credible intervals from {n_samples} samples "
                         f"of the posterior of reversible transition matrices at each lag"
                         + (" (sliding-window counts divided by the lag)" if every_frame else "")
                         + "; the predictions' intervals from powers of posterior samples of the model's counts.")
        for k in range(1, K + 1):
            rows, _ = run_count_rows(placed, k * model.lag, n_states=n_lab, every_frame=every_frame,
                                     blocks_per_run=blocks, client=client)
            full = _on_model_states(unflatten(np.asarray(rows.sum(axis=0)).ravel(), n_lab), model)
            if k == 1:
                support_counts = full
            fit = fit_sample(full, reversible=model.reversible)
            bar.update(1)
            if fit is None:
                lost.append((k, n_kept, 1.0))
                bar.update(n_samples)
                continue
            keep, T, pi_k = fit
            estimated[k - 1] = _set_to_set(T, keep, pi, M)
            if keep.size < n_kept:
                inside = full[keep][:, keep].sum()
                lost.append((k, n_kept - keep.size, 1.0 - inside / max(full.sum(), 1)))
            if n_samples and bayes:
                samples[k - 1] = _posterior_set_to_set(full[keep][:, keep], T, k * model.lag, every_frame,
                                                       n_samples, chain_seeds[k - 1], keep, pi, M, bar)
            elif n_samples:
                initial = np.zeros(n_kept)
                initial[keep] = pi_k
                sampled = sample_rows(weights, rows)
                if client is not None:
                    samples[k - 1] = map_sample_batches(
                        _ck_samples, sampled, n_lab, model.states, model.reversible, initial,
                        pi, M, client=client, what=f"Chapman–Kolmogorov samples at {k} lags", bar=bar)
                else:
                    samples[k - 1] = _ck_samples(sampled, n_lab, model.states, model.reversible,
                                                 initial, pi, M, bar)
    finally:
        bar.close()

    if n_samples:
        lower, upper = percentile_interval(samples, confidence, axis=1)
        share = np.mean(np.isfinite(samples), axis=1)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN or single-value slices
            spread = np.nanstd(samples, axis=1, ddof=1) if n_samples > 1 else np.full_like(estimated, np.nan)
    else:
        lower = upper = spread = np.full_like(estimated, np.nan)
        share = np.zeros_like(estimated)
    for k, n_lost, frac in lost:
        notes.append(f"At lag {k} x tau ({k * model.lag} frames) {n_lost} of the model's {n_kept} states fall "
                     f"outside the largest connected set ({100 * frac:.3g}% of the counts); they are left out of "
                     f"the estimate at that lag.")
    judged = _judge(predicted, estimated, lower, upper, spread, share, share * n_samples, confidence, tolerance)
    support = _support(model, support_counts, M, every_frame)
    verdict = _verdict(judged["within"], support)
    criterion = _ck_criterion(verdict, predicted, estimated, lower, upper, judged, support, model, confidence,
                              tolerance, n_samples, bayes)
    result = CKResult(members=[np.asarray(s, dtype=np.int64) for s in sets], multiples=np.arange(1, K + 1),
                      lag=model.lag, dt=model.dt, unit=model.unit, predicted=predicted, estimated=estimated,
                      lower=lower, upper=upper, within=judged["within"], used_tolerance=judged["used_tolerance"],
                      outside_by=judged["outside_by"], set_populations=populations, samples=samples,
                      confidence=confidence, tolerance=tolerance, n_samples=n_samples,
                      passed=verdict == "passed", criterion=criterion, notes=notes,
                      deviation=judged["deviation"], outside_interval=judged["outside_interval"],
                      threshold=judged["threshold"], n_compared=judged["n_compared"], verdict=verdict,
                      uncertainty="bayes" if bayes else "bootstrap", predicted_lower=pred_lower,
                      predicted_upper=pred_upper)
    skewed = result.estimate_outside
    if skewed.any():
        notes.append(f"At {int(skewed.sum())} point(s) the estimate lies outside the {100 * confidence:g}% "
                     f"bootstrap interval ({_pairs_text(skewed, result.multiples)}): the resampled values are "
                     f"skewed or too few there, so those intervals do not describe the estimate's uncertainty "
                     f"(column estimate_outside of the table).")
    return result


def _judge(pred, est, lower, upper, spread, share, n_valid, confidence, tolerance) -> dict:
    """Judge every point: deviations in standard errors against one family-wise threshold.

    Each pointwise comparison at ``confidence`` would fail by chance at a rate 1 - confidence;
    over n compared points at least one such miss is nearly certain. The verdict therefore
    controls the family-wise error: with p-values of the deviation from Student's t (the
    standard error is estimated from the samples), Holm's step-down procedure (Holm, Scand. J. Stat. 6, 65 (1979)) finds the failing
    points; it fails some point exactly when the Bonferroni threshold ``threshold`` is exceeded.
    """
    from scipy.stats import t as student

    finite = np.isfinite(est)
    diff = pred - est
    has_ci = (np.isfinite(lower) & np.isfinite(upper) & (upper - lower > 0) & (share >= MIN_VALID_SHARE)
              & np.isfinite(spread) & (spread > 0))
    same = np.abs(diff) <= _SAME
    with np.errstate(invalid="ignore", divide="ignore"):
        deviation = np.where(has_ci, diff / np.where(has_ci, spread, 1.0), np.nan)
    compared = has_ci & finite & ~same
    n = int(compared.sum())
    alpha = 1.0 - confidence
    # the standard error is itself estimated from the samples: Student's t with (samples - 1)
    # degrees of freedom, not the normal law (with 20 samples the normal one fails too often)
    dof = np.maximum(n_valid - 1, 1)
    threshold = float(student.isf(alpha / (2 * max(n, 1)), dof[compared].min() if n else np.inf))
    # Holm: the i-th smallest p-value (i = 0..n-1) is compared with alpha / (n - i) until one passes
    p = 2 * student.sf(np.abs(deviation[compared]), dof[compared])
    order = np.argsort(p, kind="stable")
    ok = p[order] > alpha / (n - np.arange(n))
    n_rejected = int(np.argmax(ok)) if ok.any() else n
    failing = np.zeros(n, dtype=bool)
    failing[order[:n_rejected]] = True
    fail_ci = np.zeros_like(compared)
    fail_ci[compared] = failing
    used_tol = finite & ~has_ci
    fail_tol = used_tol & ~same & (np.abs(diff) > tolerance)
    within = finite & ~fail_ci & ~fail_tol
    with np.errstate(invalid="ignore"):
        outside_interval = has_ci & ((pred < lower - 1e-12) | (pred > upper + 1e-12))
        outside_by = np.where(has_ci, np.maximum(np.abs(diff) - threshold * np.where(has_ci, spread, 0.0), 0.0),
                              np.maximum(np.abs(diff) - tolerance, 0.0))
    outside_by[within] = 0.0
    outside_by[~finite] = np.nan
    return dict(within=within, used_tolerance=used_tol, outside_by=outside_by, deviation=deviation,
                outside_interval=outside_interval, threshold=threshold, n_compared=n, compared=compared,
                finite=finite)


def _support(model, counts, M, every_frame) -> dict:
    """How much the data can say: changes between the tested sets and crossings of the slowest
    process, counted at the model's lag (sliding windows divided by the lag)."""
    if counts is None:
        return {"set_changes": np.nan, "crossings": np.nan}
    per = float(model.lag) if every_frame else 1.0
    C = np.asarray(counts.toarray() if hasattr(counts, "toarray") else counts, dtype=float)
    between = M.T @ C @ M
    set_changes = float((between.sum() - np.trace(between)) / per)
    crossings = np.nan
    if model.n_states >= 2:
        side = np.real(model.modes(2)[:, 1]) > 0
        crossings = slow_crossings(C, side, lag=model.lag, every_frame=every_frame)
    return {"set_changes": set_changes, "crossings": crossings}


def _verdict(within, support) -> str:
    few = [v for v in (support["set_changes"], support["crossings"]) if np.isfinite(v) and v < FEW_CROSSINGS]
    if few:
        return "inconclusive"
    return "passed" if bool(np.all(within)) else "failed"


def _check_model(model) -> MarkovModel:
    if not isinstance(model, MarkovModel):
        raise InputError(f"model must be a MarkovModel (from build_model, lag_scan(...).model(lag) or "
                         f"load_model), but got {type(model).__name__}")
    return model


def _largest_multiple(runs, lag: int) -> int:
    longest = max(r.size for r in runs)
    return (longest - 1) // lag


def _check_reach(runs, model, multiples: int) -> None:
    longest = max(r.size for r in runs)
    reach = _largest_multiple(runs, model.lag)
    if reach < 1:
        raise InputError(f"labels: the longest run has {longest} frames, not more than the model's lag "
                         f"({model.lag} frames); give the label trajectories the model was built from")
    if multiples > reach:
        raise InputError(
            f"multiples={multiples} needs lags up to {multiples} x {model.lag} = {multiples * model.lag} frames "
            f"({multiples * model.lag_time:g} {model.unit}), but the longest run has {longest} frames: the data "
            f"reach at most multiples={reach} (k x lag shorter than the longest run); lower multiples or "
            f"supply longer runs")


def _resolve_sets(model, sets, n_sets):
    """(list of label arrays, how they were obtained in words)."""
    if sets is not None:
        if n_sets is not None:
            raise InputError("give either sets (your own sets of states) or n_sets (PCCA+ macrostates), "
                             "not both")
        if isinstance(sets, (str, bytes)) or not hasattr(sets, "__iter__"):
            raise InputError(f"sets must be a list of lists of state labels, but got {brief(sets)}")
        sets = list(sets)
        if not sets:
            raise InputError("sets is empty: give at least one list of state labels")
        out = [as_state_set(s, f"sets[{i}]", model.states) for i, s in enumerate(sets)]
        for i in range(len(out)):
            for j in range(i + 1, len(out)):
                both = np.intersect1d(out[i], out[j])
                if both.size:
                    shown = ", ".join(str(int(x)) for x in both[:10]) + (" ..." if both.size > 10 else "")
                    raise InputError(f"sets[{i}] and sets[{j}] share label(s) {shown}; the sets must be "
                                     f"disjoint: put each state in one set only")
        return out, f"{len(out)} set(s) of states given by the user."
    if n_sets is None and model.n_states == 2:
        n_sets, how = 2, "2 sets: the model has two states."
    elif n_sets is None:
        n_sets, reason = model.suggest_n_macrostates()
        how = f"PCCA+ macrostates, number suggested from the model's spectrum: {reason}."
        if n_sets < 2:
            n_sets = 2
            how = (f"2 PCCA+ macrostates: the spectrum suggests no clear split ({reason}), and the test needs "
                   f"at least two sets.")
        else:
            how = f"{n_sets} " + how
    else:
        n_sets = check_int(n_sets, "n_sets", minimum=2)
        if n_sets > model.n_states:
            raise InputError(f"n_sets must not exceed the number of states of the model ({model.n_states}), "
                             f"but got {n_sets}; choose fewer macrostates")
        how = f"{n_sets} PCCA+ macrostates."
    macro = model.find_macrostates(n_sets)
    out = macro.members
    empty = [j for j, s in enumerate(out) if s.size == 0]
    if empty:
        raise InputError(f"n_sets={n_sets}: macrostate(s) {empty} hold no state by largest membership, so "
                         f"they cannot be tested; choose fewer macrostates")
    how += (" The data side uses crisp sets: each state counts for the macrostate of largest "
            "membership.")
    return out, how


def _start_rows(pi, M) -> np.ndarray:
    """(m, n): stationary weights inside each set, normalized (NaN rows for sets without weight)."""
    W = (M * pi[:, None]).T
    total = W.sum(axis=1, keepdims=True)
    with np.errstate(invalid="ignore", divide="ignore"):
        return W / total


def _set_to_set(T, keep, pi, M) -> np.ndarray:
    """p0_a T 1_b for all sets, T acting on the states ``keep`` (positions in the model's kept set)."""
    Mk = M[keep]
    P0 = _start_rows(pi[keep], Mk)
    out = P0 @ T @ Mk
    out[~np.isfinite(P0).all(axis=1)] = np.nan
    return out


def _ck_samples(rows, n_lab, states, reversible, initial, pi, M, bar=None) -> np.ndarray:
    """Set-to-set probabilities of bootstrap samples given as flattened count rows, shape
    (n_rows, m, m), NaN where a sample has no usable estimate. Module-level and free of model
    objects, so that a dask worker can run it on a batch of rows."""
    m = M.shape[1]
    out = np.full((rows.shape[0], m, m), np.nan)
    for b in range(rows.shape[0]):
        C = unflatten(rows.getrow(b), n_lab)[states][:, states]
        got = fit_sample(C, reversible=reversible, initial=initial)
        if got is not None:
            out[b] = _set_to_set(got[1], got[0], pi, M)
        if bar is not None:
            bar.update(1)
    return out


def _posterior_set_to_set(C, T, lag, every_frame, n_samples, seed, keep, pi, M, bar) -> np.ndarray:
    """Set-to-set probabilities (n_samples, m, m) of posterior samples of the counts ``C`` at
    ``lag`` among the states ``keep`` (``T``: their reversible estimate, the sampler's start)."""
    out = np.full((n_samples, M.shape[1], M.shape[1]), np.nan)
    for b, (Ts, _) in enumerate(posterior_at_lag(C, n_samples, lag=lag, every_frame=every_frame, seed=int(seed),
                                                 initial=T)):
        out[b] = _set_to_set(Ts, keep, pi, M)
        bar.update(1)
    return out


def _posterior_powers(model, K, n_samples, every_frame, seed, M, bar) -> np.ndarray:
    """Predictions p0_a T^k 1_b (K, n_samples, m, m) from posterior samples T of the model's counts."""
    P0 = _start_rows(model.equilibrium, M)
    out = np.empty((K, n_samples, M.shape[1], M.shape[1]))
    draws = posterior_at_lag(model.transition_counts, n_samples, lag=model.lag, every_frame=every_frame,
                             seed=int(seed), initial=model.propagator)
    for b, (T, _) in enumerate(draws):
        P = P0
        for k in range(K):
            P = P @ T
            out[k, b] = P @ M
        bar.update(1)
    return out


def _on_model_states(C, model):
    """Counts among the model's kept states (rows/columns in the order of ``model.states``)."""
    return C[model.states][:, model.states]


def _pairs_text(mask, multiples, limit=8) -> str:
    k, a, b = np.nonzero(mask)
    items = [f"{int(x)}->{int(y)} at k={int(multiples[z])}" for z, x, y in zip(k, a, b)]
    return ", ".join(items[:limit]) + (f" and {len(items) - limit} more" if len(items) > limit else "")


def _ck_criterion(verdict, pred, est, lower, upper, judged, support, model, confidence, tolerance,
                  n_samples, bayes=False) -> str:
    K = pred.shape[0]
    total = pred.size
    multiples = np.arange(1, K + 1)
    conf = f"{100 * confidence:g}%"
    within, used_tol, finite = judged["within"], judged["used_tolerance"], judged["finite"]
    dev, n = judged["deviation"], judged["n_compared"]
    head = f"T(tau)^k (k = 1..{K}, tau = {model.lag_time:g} {model.unit})"
    if n_samples:
        rule = (f"a prediction {head} fails when it deviates from the estimate at lag k tau by more than "
                f"{judged['threshold']:.2f} {'posterior' if bayes else 'bootstrap'} standard errors of that estimate, the {conf} family-wise "
                f"limit over the {n} compared point(s) (Bonferroni-Holm; k = 1 and identical values are not "
                f"compared)")
    else:
        rule = (f"without bootstrap (n_samples=0) every prediction {head} must lie within {tolerance:g} of the "
                f"estimate at lag k tau")
    spread_text = ""
    if n:
        z = np.where(judged["compared"], np.abs(dev), -1.0)
        kz, az, bz = np.unravel_index(int(np.argmax(z)), z.shape)
        n_out = int((judged["outside_interval"] & judged["compared"]).sum())
        spread_text = (f" {n_out} of the {n} compared point(s) lie outside their pointwise {conf} interval "
                       f"(about {(1 - confidence) * n:.2g} expected by chance for a Markovian model); the largest "
                       f"deviation is {z[kz, az, bz]:.2f} standard errors (set {az} -> set {bz} at k = {kz + 1}).")
    tol_text = ""
    if n_samples and used_tol.any():
        tol_text = (f" {int(used_tol.sum())} pair(s) had too few data for an interval and were held to within "
                    f"{tolerance:g} instead: {_pairs_text(used_tol, multiples)}.")
    n_fail = int((~within).sum())
    details = ""
    if (~finite).any():
        details += (f" {int((~finite).sum())} pair(s) could not be estimated because their start set has no "
                    f"state left in the connected set at that lag: {_pairs_text(~finite, multiples)}.")
    miss = np.where(~within & finite, judged["outside_by"], -1.0)
    if miss.max() >= 0:
        k, a, b = np.unravel_index(int(np.argmax(miss)), miss.shape)
        if used_tol[k, a, b]:
            ref = f"{miss[k, a, b]:.2g} beyond the tolerance {tolerance:g}"
        else:
            ref = (f"{dev[k, a, b]:+.2f} standard errors off (pointwise interval [{lower[k, a, b]:.3g}, "
                   f"{upper[k, a, b]:.3g}])")
        details += (f" Furthest off: set {a} -> set {b} at k = {k + 1} ({(k + 1) * model.lag_time:g} "
                    f"{model.unit}): predicted {pred[k, a, b]:.3g}, estimated {est[k, a, b]:.3g}, {ref}; the "
                    f"largest difference is {np.nanmax(np.abs(pred - est)):.2g}.")
    if verdict == "inconclusive":
        found = "none fails" if n_fail == 0 else f"{n_fail} of {total} fail"
        return (f"Inconclusive: at the model's lag the data change between the tested sets only "
                f"{support['set_changes']:.3g} time(s) and cross between the two sides of the slowest process "
                f"{support['crossings']:.3g} time(s); with fewer than {FEW_CROSSINGS} the intervals, and so this "
                f"test, have no support whatever the comparison shows. By the rule ({rule}) {found}."
                f"{details}{spread_text}{tol_text} Collect more or longer runs before trusting this model.")
    if verdict == "passed":
        return f"Passed: {rule}; all {total} pass.{spread_text}{tol_text}"
    text = f"Failed: {rule}; {n_fail} of {total} do not.{details}"
    text += spread_text
    text += (" A model that fails is not Markovian at this lag on these sets: try a longer lag, finer "
             "microstates, or other coordinates.")
    return text + tol_text


# =============================================================================================
# Lag flow
# =============================================================================================

@dataclass(eq=False)
class LagFlow:
    """Result of :func:`lag_flow`: self-transition probabilities of two sets as the lag grows.

    Row k of each (K + 1, 2) array is lag k tau (row 0: lag 0, where both probabilities are 1);
    column 0 is set a, column 1 set b.

    Attributes
    ----------
    pair : tuple of int
        Indices (a, b) of the two sets in the Chapman–Kolmogorov result.
    members : list of ndarray of int
        Original labels of the states of sets a and b.
    lags : ndarray of int, shape (K + 1,)
        0, tau, 2 tau, ... in frames.
    dt : float
    unit : str
    predicted, estimated : ndarray, shape (K + 1, 2)
        (p_aa, p_bb) from powers of the model and from the data at each lag.
    lower, upper : ndarray, shape (K + 1, 2)
        Bootstrap interval of ``estimated`` (NaN without bootstrap).
    within : ndarray of bool, shape (K + 1,)
        Both predicted coordinates pass the Chapman–Kolmogorov criterion at that lag.
    fixed_point : ndarray, shape (2,)
        (pi_a, pi_b), the stationary probabilities of the two sets: where both paths end.
    coincide : bool
        The paths coincide at every lag (within the intervals, or the tolerance).
    summary : str
        What the picture says, in words.
    ck : CKResult
        The test the numbers come from.
    """

    pair: tuple
    members: list
    lags: np.ndarray
    dt: float
    unit: str
    predicted: np.ndarray
    estimated: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    within: np.ndarray
    fixed_point: np.ndarray
    coincide: bool
    summary: str
    ck: CKResult = field(repr=False)

    @property
    def lag_times(self) -> np.ndarray:
        """The lags in physical time (in :attr:`unit`)."""
        return self.lags * self.dt

    def relaxed(self, which: str = "estimated") -> np.ndarray:
        """Share of the way from lag 0 to the fixed point, (1 - p) / (1 - pi) per set, shape (K + 1, 2).

        0 at lag 0, 1 at equilibrium; for a single relaxation process with eigenvalue lambda it is
        1 - lambda^k for both sets.
        """
        if which not in ("estimated", "predicted"):
            raise InputError(f"which must be 'estimated' or 'predicted', but got {brief(which)}")
        p = getattr(self, which)
        with np.errstate(divide="ignore", invalid="ignore"):
            return (1.0 - p) / (1.0 - self.fixed_point)

    def table(self):
        """One row per lag: ``k``, ``lag`` (frames), ``lag_time`` (``df.attrs['unit']``), and for
        sets a and b ``predicted_a``, ``predicted_b``, ``estimated_a``, ``estimated_b``,
        ``lower_a``, ``upper_a``, ``lower_b``, ``upper_b``; ``distance`` (between the predicted and
        estimated points) and ``within``. ``df.attrs`` also holds ``pair`` and ``fixed_point``."""
        import pandas as pd
        data = {"k": np.arange(self.lags.size), "lag": self.lags, "lag_time": self.lag_times}
        for c, name in enumerate("ab"):
            data[f"predicted_{name}"] = self.predicted[:, c]
        for c, name in enumerate("ab"):
            data[f"estimated_{name}"] = self.estimated[:, c]
        for c, name in enumerate("ab"):
            data[f"lower_{name}"] = self.lower[:, c]
            data[f"upper_{name}"] = self.upper[:, c]
        data["distance"] = np.hypot(*(self.predicted - self.estimated).T)
        data["within"] = self.within
        df = pd.DataFrame(data)
        df.attrs.update(unit=self.unit, pair=self.pair, fixed_point=tuple(self.fixed_point.tolist()))
        return df


def lag_flow(source, labels=None, *, pair=(0, 1), sets=None, n_sets=None, multiples=None, n_samples=CK_SAMPLES,
             seed=None, confidence=0.95, tolerance=0.05, progress=False) -> LagFlow:
    """How two sets relax toward equilibrium as the lag grows: data against the model.

    As the lag t grows, every row of a Markov model's coarse-grained transition matrix flows to
    the fixed point where it equals the stationary distribution, so the probability p_aa(t) that
    set a is occupied a time t after it was occupied falls from 1 at t = 0 to the set's
    stationary population pi_a. For two sets a and b this draws the path of (p_aa, p_bb) in the
    unit square from the corner (1, 1) to the fixed point (pi_a, pi_b), once estimated from the
    data at each lag k tau and once predicted by T(tau)^k. A single relaxation process moves
    both along the straight line between the corner and the fixed point; more processes bend
    the path. A Markovian model's path coincides with the data's; memory at lag tau (a lag too
    short, states too coarse) makes them part, usually with the model relaxing too fast (the model's
    points run ahead toward the fixed point). The data path does not depend on the model's lag,
    so the views of models at several lags can be laid over each other
    (:func:`msmkit.plots.plot_lag_flow` takes a list). With only two states, or two sets whose
    exchange is a single process, both paths run along the straight line and part only in how
    far along it they are at each lag.

    Parameters
    ----------
    source : MarkovModel or CKResult
        A model (the test is then run with the options below) or the result of
        :func:`chapman_kolmogorov`, whose numbers are reused without computing anything again.
    labels : label trajectories
        Needed with a model; not allowed with a CKResult.
    pair : (int, int), default (0, 1)
        Indices of the two sets (macrostates are ordered by population, largest first).
    sets, n_sets, n_samples, seed, confidence, tolerance, progress
        As in :func:`chapman_kolmogorov` (with a model only).
    multiples : int, optional
        Largest k (with a model only); default 10, or fewer when the runs are shorter
        (said in ``ck.notes``).

    Returns
    -------
    LagFlow
    """
    if isinstance(source, CKResult):
        given = [name for name, value in (("labels", labels), ("sets", sets), ("n_sets", n_sets),
                                          ("multiples", multiples)) if value is not None]
        if given:
            raise InputError(f"{', '.join(given)} cannot be given with a Chapman–Kolmogorov result: the sets and "
                             f"lags are fixed; pass the model instead to choose them")
        ck = source
    elif isinstance(source, MarkovModel):
        if labels is None:
            raise InputError("labels are needed with a model: pass the label trajectories the model was "
                             "built from (or pass a Chapman–Kolmogorov result instead of the model)")
        runs = as_label_trajectories(labels)
        note = None
        if multiples is None:
            reach = _largest_multiple(runs, source.lag)
            multiples = max(1, min(FLOW_MULTIPLES, reach))
            if reach < FLOW_MULTIPLES:
                note = (f"The runs reach {reach} multiples of the lag only, so the flow is followed to "
                        f"k = {multiples} instead of {FLOW_MULTIPLES}.")
        ck = chapman_kolmogorov(source, runs, n_sets=n_sets, sets=sets, multiples=multiples, n_samples=n_samples,
                                seed=seed, confidence=confidence, tolerance=tolerance, progress=progress)
        if note:
            ck.notes.append(note)
    else:
        raise InputError(f"source must be a MarkovModel or the result of chapman_kolmogorov, but got "
                         f"{type(source).__name__}")
    a, b = _check_pair(pair, ck.n_sets)

    def path(arr, start):
        return np.vstack([[start, start], np.stack([arr[:, a, a], arr[:, b, b]], axis=1)])

    predicted = path(ck.predicted, 1.0)
    estimated = path(ck.estimated, 1.0)
    lower = path(ck.lower, 1.0 if ck.n_samples else np.nan)
    upper = path(ck.upper, 1.0 if ck.n_samples else np.nan)
    within = np.concatenate([[True], ck.within[:, a, a] & ck.within[:, b, b]])
    lags = np.concatenate([[0], ck.multiples * ck.lag]).astype(np.int64)
    fixed = ck.set_populations[[a, b]].copy()
    coincide = bool(np.all(within))
    summary = _flow_summary(a, b, lags * ck.dt, ck.unit, predicted, estimated, within, fixed, coincide)
    return LagFlow(pair=(a, b), members=[ck.members[a], ck.members[b]], lags=lags, dt=ck.dt, unit=ck.unit,
                   predicted=predicted, estimated=estimated, lower=lower, upper=upper, within=within,
                   fixed_point=fixed, coincide=coincide, summary=summary, ck=ck)


def _check_pair(pair, m):
    if isinstance(pair, (str, bytes)) or not hasattr(pair, "__len__") or len(pair) != 2:
        raise InputError(f"pair must be two set indices (a, b), but got {brief(pair)}")
    a = check_int(pair[0], "pair[0]", minimum=0, maximum=m - 1)
    b = check_int(pair[1], "pair[1]", minimum=0, maximum=m - 1)
    if a == b:
        raise InputError(f"pair must name two different sets, but got ({a}, {b})")
    return a, b


def _flow_summary(a, b, times, unit, pred, est, within, fixed, coincide) -> str:
    head = f"Sets {a} and {b} relax toward their populations ({fixed[0]:.3g}, {fixed[1]:.3g})"
    if coincide:
        return (f"{head}; the data path and the model's path coincide at every lag up to {times[-1]:g} {unit}: "
                f"no sign of memory between these sets.")
    first = int(np.argmax(~within))
    ahead = np.nansum((1 - pred[first]) - (1 - est[first]))
    how = ("the model relaxes faster than the data (memory: a longer lag or finer states should help)"
           if ahead > 0 else "the model relaxes more slowly than the data")
    return f"{head}; the paths part from {times[first]:g} {unit} on: {how}."


# =============================================================================================
# VAMP-2
# =============================================================================================

def _model_correlations(model):
    """(c00, C01, c11) of the model up to a common factor: diagonal instantaneous correlations of
    the indicator functions of the kept states at t and t + tau, and their time-lagged
    correlation matrix.

    Reversible models use the symmetric form implied by the estimate (c00 = c11 = pi,
    C01 = diag(pi) T); non-reversible models with counts use the counts (row sums, C, column
    sums); a non-reversible model without counts uses pi, diag(pi) T and pi T.
    """
    T = model.propagator
    pi = model.equilibrium
    if model.reversible:
        X = pi[:, None] * T
        return pi, 0.5 * (X + X.T), pi
    if model.transition_counts is not None:
        C = model.transition_counts.toarray().astype(float)
        return C.sum(axis=1), C, C.sum(axis=0)
    return pi, pi[:, None] * T, pi @ T


def _singular_functions(model):
    """Singular values (descending) and singular functions f (left), g (right) on the kept states,
    orthonormal in the model's own correlations: f^T diag(c00) f = I, g^T diag(c11) g = I."""
    c00, C01, c11 = _model_correlations(model)
    s0, s1 = np.sqrt(c00), np.sqrt(c11)
    Kmat = C01 / s0[:, None] / s1[None, :]
    U, S, Vt = la.svd(Kmat)
    return S, U / s0[:, None], Vt.T / s1[:, None]


def _check_k(k, model):
    n = model.n_states
    if k is None:
        return n - 1
    return check_int(k, "k", minimum=1, maximum=n - 1)


def vamp2_score(model, k=None) -> float:
    """VAMP-2 score of a model: the sum of the k + 1 largest squared singular values.

    The singular values are those of the whitened Koopman matrix
    K = C00^-1/2 C01 C11^-1/2 of the indicator functions of the kept states. The largest is 1
    (the constant function), so the score lies between 1 and k + 1. For a reversible model
    C00 = C11 = diag(pi) and C01 = diag(pi) T, the singular values are the magnitudes of the
    eigenvalues and the score is 1 + sum of lambda_i^2 over the k largest non-stationary
    eigenvalues. A non-reversible model with counts uses the count matrix (C01 = C, C00 and C11
    the diagonal of the row and column sums).

    Parameters
    ----------
    model : MarkovModel
    k : int, optional
        Number of non-stationary singular values (slow processes) to include; default all
        (n_states - 1).

    Returns
    -------
    float
        Dimensionless, in [1, k + 1].

    References
    ----------
    Wu & Noe, J. Nonlinear Sci. 30, 23 (2020): the VAMP-2 score and the form for Markov models.
    """
    model = _check_model(model)
    k = _check_k(k, model)
    S = _singular_functions(model)[0]
    return float(np.sum(S[:k + 1] ** 2))


def _inv_sqrt(A, rtol=1e-10):
    w, V = la.eigh(0.5 * (A + A.T))
    keep = w > rtol * max(w.max(), 0.0)
    return (V[:, keep] / np.sqrt(w[keep])) @ V[:, keep].T


def vamp2_score_on(model, labels, k=None, *, warn: bool = True) -> float:
    """VAMP-2 score of a model's singular functions on other data (e.g. held-out runs).

    The model's k + 1 leading left and right singular functions f, g (see :func:`vamp2_score`)
    are kept fixed, and the correlations C00, C01, C11 of the indicator functions are counted
    from ``labels`` at the model's lag (for a reversible model in their symmetric form:
    C01 = (C + C^T) / 2, C00 = C11 = the row sums of that). The score is
    || (f^T C00 f)^-1/2 (f^T C01 g) (g^T C11 g)^-1/2 ||_F^2: how much of the slow dynamics of the
    new data the model's functions capture. Scored on the data the model was estimated from it
    equals :func:`vamp2_score` (exactly for a non-reversible model, and for a reversible one
    whenever the counts are symmetric). Frames in states outside the model's kept set are left
    out.

    Parameters
    ----------
    model : MarkovModel
        The model trained on other data.
    labels : label trajectories
        The test data, labeled with the same microstates.
    k : int, optional
        Number of non-stationary singular functions; default all.
    warn : bool
        Warn when much of the test data falls outside the model's states.

    Returns
    -------
    float

    References
    ----------
    Wu & Noe, J. Nonlinear Sci. 30, 23 (2020); McGibbon & Pande, J. Chem. Phys. 142, 124105 (2015).
    """
    model = _check_model(model)
    k = _check_k(k, model)
    runs = as_label_trajectories(labels)
    if max(r.size for r in runs) <= model.lag:
        raise InputError(f"labels: every run is shorter than the model's lag ({model.lag} frames) + 1, so no "
                         f"transition can be counted; give longer test runs")
    n_lab = max(max((int(r.max()) for r in runs if r.size), default=-1), int(model.states.max())) + 1
    every_frame = bool(model.metadata.get("parameters", {}).get("every_frame", True))
    counts = count_csr(runs, model.lag, n_lab, every_frame)
    total = counts.sum()
    C = counts[model.states][:, model.states].toarray().astype(float)
    inside = C.sum()
    if inside == 0:
        raise InputError(f"labels: no transition at lag {model.lag} falls among the model's states; the test data "
                         f"must be labeled with the same microstates as the model")
    if warn and inside < 0.9 * total:
        warnings.warn(f"{100 * (1 - inside / total):.3g}% of the test transitions involve states outside the "
                      f"model's kept set and are left out of the score", DiagnosticWarning, stacklevel=2)
    if model.reversible:
        C = 0.5 * (C + C.T)
    S, f, g = _singular_functions(model)
    f, g = f[:, :k + 1], g[:, :k + 1]
    A = f.T @ (C.sum(axis=1)[:, None] * f)
    B = f.T @ C @ g
    D = g.T @ (C.sum(axis=0)[:, None] * g)
    W = _inv_sqrt(A) @ B @ _inv_sqrt(D)
    return float(np.sum(W ** 2))


# =============================================================================================
# Cross-validation
# =============================================================================================

@dataclass(eq=False)
class CrossValidation:
    """Result of :func:`cross_validate`.

    Attributes
    ----------
    n_states : ndarray of int or None
        Candidate numbers of microstates (None when label trajectories were given).
    lags : ndarray of int
        Candidate lags in frames.
    scores : ndarray, shape (len(n_states) or 1, len(lags), n_folds)
        VAMP-2 score on the held-out runs of each fold.
    k : int
        Non-stationary singular functions scored.
    n_folds : int
    folds : list of ndarray of int
        Indices of the runs held out in each fold.
    dt : float
    unit : str
    notes : list of str
    """

    n_states: np.ndarray | None
    lags: np.ndarray
    scores: np.ndarray
    k: int
    n_folds: int
    folds: list
    dt: float
    unit: str
    notes: list = field(default_factory=list)

    @property
    def mean(self) -> np.ndarray:
        """Mean test score over folds, shape (len(n_states) or 1, len(lags))."""
        return np.nanmean(self.scores, axis=-1)

    @property
    def spread(self) -> np.ndarray:
        """Standard deviation of the test score over folds (ddof = 1)."""
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            return np.nanstd(self.scores, axis=-1, ddof=1)

    @property
    def best(self) -> dict | None:
        """{lag: number of microstates with the highest mean test score at that lag}, or None
        without candidate numbers of microstates. Scores are compared at one lag only."""
        if self.n_states is None:
            return None
        mean = self.mean
        return {int(lag): int(self.n_states[int(np.nanargmax(mean[:, j]))]) for j, lag in enumerate(self.lags)}

    def table(self):
        """One row per candidate: ``n_states`` (when clustering was cross-validated), ``lag``,
        ``lag_time`` (``df.attrs['unit']``), ``mean``, ``spread`` (standard deviation over folds),
        ``folds`` (number of scored folds)."""
        import pandas as pd
        rows = []
        ns = self.n_states if self.n_states is not None else [None]
        mean, spread = self.mean, self.spread
        for i, n in enumerate(ns):
            for j, lag in enumerate(self.lags):
                row = {} if n is None else {"n_states": int(n)}
                row.update(lag=int(lag), lag_time=lag * self.dt, mean=mean[i, j], spread=spread[i, j],
                           folds=int(np.isfinite(self.scores[i, j]).sum()))
                rows.append(row)
        df = pd.DataFrame(rows)
        df.attrs.update(unit=self.unit, k=self.k)
        return df


def cross_validate(trajs, n_states=None, lags=1, *, n_folds=5, k=None, reversible=True, cluster=None,
                   stride=1, seed=None, dt=None, unit=None, progress=False, cancel=None) -> CrossValidation:
    """Cross-validate numbers of microstates (and lags) by the VAMP-2 score on held-out runs.

    The runs are split into ``n_folds`` groups of whole runs. For each fold and each candidate,
    the microstates are fitted on the other runs only (k-means by default), a model is built
    from those training runs, and the model's singular functions are scored on the held-out runs
    (:func:`vamp2_score_on`). Too few microstates miss slow processes; too many fit noise
    that the held-out data do not repeat: the mean test score peaks in between.

    Parameters
    ----------
    trajs : feature trajectories, or label trajectories when ``n_states`` is None
        Runs of frames x features (arrays, a TrajectorySet), or integer label trajectories to
        cross-validate lags only.
    n_states : int or list of int, optional
        Candidate numbers of microstates.
    lags : int or list of int, default 1
        Candidate lags in frames. VAMP-2 scores fall with the lag for any model, so compare
        numbers of microstates at one lag, not scores across lags.
    n_folds : int, default 5
        Groups of runs (at least 2, at most the number of runs).
    k : int, optional
        Slow processes (non-stationary singular functions) scored, the same for every
        candidate; default 5. A model of n states carries at most n - 1 and is scored with
        those (a model too coarse to hold the slow processes scores lower). Choose k near the
        number of slow processes you expect: every extra function adds a little fitted noise
        to the score of fine models.
    reversible : bool, default True
    cluster : callable, optional
        ``cluster(n_states)`` returning an unfitted object with ``fit(runs)`` and ``assign(runs)``
        (e.g. a configured :class:`~msmkit.states.Microstates`). Default:
        ``Microstates(n_states, stride=stride, seed=seed)``.
    stride : int, default 1
        Fit k-means on every ``stride``-th frame (default clustering only).
    seed : int, optional
        Seeds the split into folds and the clustering.
    dt, unit : optional
        Time between frames and the unit (default: from ``trajs`` when it carries them, else
        1 "step").
    progress : bool
    cancel : object with ``is_set()``, optional
        Asked after every fitted candidate (one fold, one number of microstates, one lag); once
        set, :class:`~msmkit.errors.Cancelled` is raised.

    Returns
    -------
    CrossValidation
        ``.table()``, ``.best``.

    References
    ----------
    McGibbon & Pande, J. Chem. Phys. 142, 124105 (2015); Wu & Noe, J. Nonlinear Sci. 30, 23 (2020).
    """
    dt = check_dt(dt if dt is not None else (getattr(trajs, "dt", None) or 1.0))
    unit = check_unit(unit if unit is not None else (getattr(trajs, "unit", None) or "step"))
    labels_given = n_states is None
    if labels_given:
        runs = as_label_trajectories(trajs, "trajs")
        candidates = None
    else:
        runs = as_float_trajectories(trajs, "trajs")
        candidates = _int_list(n_states, "n_states", minimum=2)
    lag_list = _int_list(lags, "lags", minimum=1)
    n_folds = check_int(n_folds, "n_folds", minimum=2)
    if n_folds > len(runs):
        raise InputError(f"n_folds={n_folds} needs at least {n_folds} runs (folds hold whole runs), but trajs has "
                         f"{len(runs)}; lower n_folds or supply more runs")
    if cluster is not None and not callable(cluster):
        raise InputError(f"cluster must be a callable cluster(n_states) returning an object with fit and assign, "
                         f"but got {brief(cluster)}")
    stride = check_int(stride, "stride", minimum=1)
    smallest = min(candidates) if candidates is not None else \
        max(int(r.max()) for r in runs if r.size) + 1
    notes = []
    k = CV_PROCESSES if k is None else check_int(k, "k", minimum=1)
    notes.append(f"Scored the stationary process and up to {k} slow processes (k={k}) for every candidate.")
    if smallest - 1 < k:
        notes.append(f"Candidates with fewer than {k + 1} states can only carry n_states - 1 slow processes and are "
                     f"scored with those: a model too coarse for the slow dynamics scores lower, as it should.")
    if len(lag_list) > 1:
        notes.append("VAMP-2 scores fall with the lag for any model; compare candidates at the same lag.")

    reversible = check_bool(reversible, "reversible")
    rng = np.random.default_rng(check_seed(seed))
    folds = np.array_split(rng.permutation(len(runs)), n_folds)
    n_rows = 1 if candidates is None else len(candidates)
    scores = np.full((n_rows, len(lag_list), n_folds), np.nan)
    seen = []
    bar = progress_bar(n_folds * n_rows * len(lag_list), progress, "cross-validation", cancel)
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", DiagnosticWarning)
            for f, test_idx in enumerate(folds):
                test_set = set(test_idx.tolist())
                train = [runs[i] for i in range(len(runs)) if i not in test_set]
                test = [runs[i] for i in test_idx]
                for i in range(n_rows):
                    if candidates is None:
                        train_labels, test_labels = train, test
                    else:
                        train_labels, test_labels = _cluster_split(cluster, candidates[i], stride, seed, train, test)
                    for j, lag in enumerate(lag_list):
                        model = build_model(train_labels, lag, dt=dt, unit=unit, reversible=reversible)
                        kk = min(k, model.n_states - 1)
                        scores[i, j, f] = vamp2_score_on(model, test_labels, kk)
                        bar.update(1)
        seen = sorted({str(w.message) for w in caught if issubclass(w.category, DiagnosticWarning)})
        for w in caught:
            if not issubclass(w.category, DiagnosticWarning):
                warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
    finally:
        bar.close()
    if seen:
        notes.append(f"{len(seen)} distinct diagnostic(s) while fitting the training folds, e.g.: {seen[0]}")
    return CrossValidation(n_states=None if candidates is None else np.asarray(candidates, dtype=np.int64),
                           lags=np.asarray(lag_list, dtype=np.int64), scores=scores, k=k, n_folds=n_folds,
                           folds=[np.sort(x) for x in folds], dt=dt, unit=unit, notes=notes)


def _cluster_split(cluster, n, stride, seed, train, test):
    if cluster is None:
        from .states import Microstates
        est = Microstates(n, stride=stride, seed=seed)
    else:
        est = cluster(n)
    est.fit(train)
    train_labels = getattr(est, "labels_", None)
    if train_labels is None:
        train_labels = est.assign(train)
    return train_labels, est.assign(test)


def _int_list(values, name, minimum):
    if isinstance(values, (numbers.Integral, np.integer)) and not isinstance(values, bool):
        values = [values]
    if isinstance(values, (str, bytes)) or not hasattr(values, "__iter__"):
        raise InputError(f"{name} must be an integer or a list of integers, but got {brief(values)}")
    out = [check_int(v, name, minimum=minimum) for v in values]
    if not out:
        raise InputError(f"{name} is empty: give at least one candidate")
    if len(set(out)) != len(out):
        raise InputError(f"{name} holds duplicates ({out}); give each candidate once")
    return out
