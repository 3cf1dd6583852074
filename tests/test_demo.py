"""Tests for msmkit.demo, the invented demo scenario."""
import numpy as np
import pytest

from msmkit import demo
from msmkit.errors import InputError
from msmkit.io import TrajectorySet


@pytest.fixture(scope="module")
def default_set():
    return demo.trajectories(seed=0)


def test_constants_and_shape(default_set):
    assert demo.DT == 0.1 and demo.UNIT == "ns"
    assert isinstance(default_set, TrajectorySet) and len(default_set) == 20
    assert default_set.feature_names == demo.FEATURE_NAMES and len(demo.FEATURE_NAMES) == 6
    assert default_set.dt == demo.DT and default_set.unit == demo.UNIT
    assert np.all((default_set.n_frames >= 2000) & (default_set.n_frames <= 8000))
    assert len(set(default_set.n_frames.tolist())) > 10  # lengths vary
    assert all(np.all(np.isfinite(r)) for r in default_set)


def test_deterministic_per_seed():
    a = demo.trajectories(seed=3, n_runs=3, min_frames=100, max_frames=200)
    b = demo.trajectories(seed=3, n_runs=3, min_frames=100, max_frames=200)
    c = demo.trajectories(seed=4, n_runs=3, min_frames=100, max_frames=200)
    assert all(np.array_equal(x, y) for x, y in zip(a, b))
    assert not np.array_equal(a[0][:100], c[0][:100])
    assert np.array_equal(demo.simulate([50, 30], seed=1)[1], demo.simulate([50, 30], seed=1)[1])


def grid_populations(spacing):
    """Boltzmann populations by grid integration of exp(-V/kT) over each basin
    (common practice), on a separate grid."""
    x, y = np.meshgrid(np.arange(-4.0, 4.0, spacing), np.arange(-3.5, 3.5, spacing), indexing="ij")
    w = np.exp(-demo.potential(x, y))
    label = demo.basin_of(x, y)
    return np.array([w[label == i].sum() for i in range(3)]) / w.sum()


def test_long_run_populations_follow_boltzmann(default_set):
    expected = grid_populations(0.0125)
    assert np.allclose(list(demo.reference_populations().values()), expected, atol=1e-4)
    per_run = np.array([np.bincount(demo.basin_of(r[:, 0], r[:, 1]), minlength=3) for r in default_set])
    n = per_run.sum(axis=1)
    observed = per_run.sum(axis=0) / n.sum()
    # standard error of a ratio estimate from the spread between independent runs
    w = n / n.sum()
    se = np.sqrt(np.sum((w[:, None] * (per_run / n[:, None] - observed)) ** 2, axis=0)
                 * len(n) / (len(n) - 1))
    assert np.all(se < 0.05), se  # enough sampling for the check to mean something
    assert np.all(np.abs(observed - expected) < 3 * se + 0.005), (observed, expected, se)


def test_slowest_process_is_resolvable(default_set):
    ref = demo.reference_timescales(3)
    assert ref[0] > ref[1] > ref[2] > 0
    assert ref[0] / demo.DT > 300 and ref[1] / demo.DT > 100  # slow processes >> frame time
    # Implied timescale -tau/ln(lambda_2) of a count matrix on grid cells of (progress, twist)
    # at a lag of 20 frames (Swope, Pitera & Suits 2004; common practice).
    edges = (np.linspace(-3.5, 3.5, 29), np.linspace(-2.8, 3.0, 25))
    cells = [np.digitize(r[:, 0], edges[0]) * 30 + np.digitize(r[:, 1], edges[1]) for r in default_set]
    used, labels = np.unique(np.concatenate(cells), return_inverse=True)
    labels = np.split(labels, np.cumsum(default_set.n_frames)[:-1])
    lag = 20
    n = len(used)
    pairs = np.concatenate([lab[:-lag] * n + lab[lag:] for lab in labels])
    counts = np.bincount(pairs, minlength=n * n).reshape(n, n).astype(float)
    counts = counts + counts.T
    # symmetric counts: T = D^-1 C is similar to D^-1/2 C D^-1/2 (real spectrum)
    d = np.sqrt(counts.sum(axis=1))
    lam = np.sort(np.abs(np.linalg.eigvalsh(counts / np.outer(d, d))))[::-1]
    implied = -lag * demo.DT / np.log(lam[1])
    assert 0.8 * ref[0] < implied < 1.4 * ref[0], (implied, ref[0])
    # every run crosses between basins several times
    changes = [np.count_nonzero(np.diff(demo.basin_of(r[:, 0], r[:, 1]))) for r in default_set]
    assert min(changes) >= 3


def test_bad_arguments():
    with pytest.raises(InputError, match="n_runs must be an integer not less than 1"):
        demo.trajectories(n_runs=0)
    with pytest.raises(InputError, match="max_frames must be an integer not less than 500"):
        demo.trajectories(min_frames=500, max_frames=100)
    with pytest.raises(InputError, match="seed must be an integer"):
        demo.trajectories(seed=1.5)
