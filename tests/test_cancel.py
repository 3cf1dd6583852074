"""Cancelling long library computations: ``cancel=`` takes any object with ``is_set()``
(threading.Event from the standard library) and is asked between units of work."""
import threading

import numpy as np
import pytest

import msmkit as mk
from msmkit.errors import Cancelled, InputError


class SetAfter:
    """Answers False ``n`` times, then True; counts the questions."""

    def __init__(self, n):
        self.n, self.asked = n, 0

    def is_set(self):
        self.asked += 1
        return self.asked > self.n


@pytest.fixture(scope="module")
def runs():
    rng = np.random.default_rng(0)
    return [rng.integers(0, 3, 400) for _ in range(6)]


def test_lag_scan_stops_between_units(runs):
    flag = SetAfter(4)
    with pytest.raises(Cancelled, match="lag scan"):
        mk.lag_scan(runs, [1, 2, 3], n_samples=10, cancel=flag)
    assert flag.asked == 5  # stopped at the first question after the flag was set
    # an unset Event changes nothing: same result as without it
    a = mk.lag_scan(runs, [1, 2], n_samples=4, seed=1, cancel=threading.Event())
    b = mk.lag_scan(runs, [1, 2], n_samples=4, seed=1)
    np.testing.assert_array_equal(a.timescales, b.timescales)
    np.testing.assert_array_equal(a.lower, b.lower)


def test_lag_scan_asks_once_per_lag_and_sample(runs):
    flag = SetAfter(10 ** 6)
    mk.lag_scan(runs, [1, 2, 3], n_samples=4, cancel=flag)
    assert flag.asked == 3 * (1 + 4)


def test_chapman_kolmogorov_stops_between_units(runs):
    model = mk.build_model(runs, lag=1)
    flag = SetAfter(2)
    with pytest.raises(Cancelled, match="Chapman–Kolmogorov"):
        mk.chapman_kolmogorov(model, runs, n_sets=2, multiples=3, n_samples=5, cancel=flag)
    done = threading.Event()
    done.set()
    with pytest.raises(Cancelled):
        mk.chapman_kolmogorov(model, runs, n_sets=2, multiples=3, n_samples=5, cancel=done)


def test_cancel_must_have_is_set(runs):
    with pytest.raises(InputError, match="cancel must be None or an object with an is_set"):
        mk.lag_scan(runs, [1], cancel=True)
