"""Interval ends of sampled values (msmkit._bootstrap)."""
import numpy as np
import pytest

from msmkit._bootstrap import bootstrap_interval, percentile_interval


def test_percentile_interval_is_numpys_weibull_quantile_ignoring_nan():
    # numpy's method="weibull" is the (m + 1) p rule (Hyndman & Fan, Am. Stat. 50, 361 (1996),
    # definition 6), the reference here; NaN samples are left out, an all-NaN column gives NaN
    rng = np.random.default_rng(0)
    x = rng.standard_normal((57, 3))
    x[[3, 10], 1] = np.nan
    x[:, 2] = np.nan
    lower, upper = percentile_interval(x, 0.9)
    for j in range(2):
        col = x[np.isfinite(x[:, j]), j]
        np.testing.assert_allclose([lower[j], upper[j]], np.quantile(col, [0.05, 0.95], method="weibull"),
                                   rtol=1e-12)
    assert np.isnan(lower[2]) and np.isnan(upper[2])
    # beyond the outermost order statistics the ends are held at the extremes
    lo, hi = percentile_interval(np.arange(5.0), 0.99)
    assert (lo, hi) == (0.0, 4.0)


@pytest.mark.parametrize("m", [199, 200, 1000])
def test_interval_of_m_draws_holds_the_nominal_share_of_the_law(m):
    # Of m uniform draws the k-th smallest has mean k / (m + 1) (order statistics of U(0, 1),
    # e.g. David & Nagaraja, Order Statistics (2003), sec. 2.2), so the interval between the
    # (m + 1) p-th and (m + 1)(1 - p)-th holds 1 - 2p of the law on average: 0.95 exactly for
    # m = 199, p = 0.025. The linear rule (m - 1) p + 1 holds about 0.940 at m = 199, which
    # 2000 replicates (s.e. of the mean share 0.0004) tell apart.
    rng = np.random.default_rng(m)
    u = rng.random((2000, m))
    lower, upper = percentile_interval(u, 0.95, axis=1)
    assert np.mean(upper - lower) == pytest.approx(0.95, abs=0.0015)


def test_bias_corrected_levels_shift_by_twice_the_median_bias():
    # bc: levels Phi(2 z0 -+ z) with z0 = Phi^-1(share below the estimate) (Efron, J. Am. Stat.
    # Assoc. 82, 171 (1987)); scipy.stats supplies Phi and the quantiles the reference uses
    from scipy import stats
    rng = np.random.default_rng(4)
    x = rng.gamma(3.0, size=400)
    est = 2.4
    z0 = stats.norm.ppf(np.mean(x < est))
    z = stats.norm.ppf(0.975)
    expected = np.quantile(x, stats.norm.cdf([2 * z0 - z, 2 * z0 + z]), method="weibull")
    np.testing.assert_allclose(bootstrap_interval(x, est, 0.95, method="bc"), expected, rtol=1e-12)
