"""Tests of msmkit._checks, the shared input gate, and of the bad-input contract of every entry
point that takes label trajectories (count_transitions, build_model, lag_scan).

The contract (DESIGN.md, "Errors"): bad input raises InputError (a ValueError) naming the
argument, the rule and the value received.
"""
import math
import sys

import numpy as np
import pytest

import msmkit as mk
from msmkit import _checks
from msmkit.errors import InputError
from msmkit.lagscan import lag_scan

GOOD = [np.array([0, 1, 0, 1, 1, 0, 2, 1, 0, 2, 2, 1, 0] * 3)]


# --------------------------------------------------------------------------- scalar checks

@pytest.mark.parametrize("value, expected", [(10, 10), (10.0, 10), (np.int64(3), 3), (np.float32(4.0), 4)])
def test_check_int_accepts_integral_values(value, expected):
    got = _checks.check_int(value, "k")
    assert got == expected and type(got) is int


@pytest.mark.parametrize("value", [True, np.bool_(False), 1.5, "3", None, math.nan, math.inf, [1]])
def test_check_int_refuses_non_integers(value):
    with pytest.raises(InputError, match=r"k must be an integer, but got"):
        _checks.check_int(value, "k")


def test_check_int_bounds_name_the_rule_and_value():
    with pytest.raises(InputError, match=r"k must be an integer not less than 2, but got 1"):
        _checks.check_int(1, "k", minimum=2)
    with pytest.raises(InputError, match=r"k must be an integer not greater than 5, but got 6"):
        _checks.check_int(6, "k", maximum=5)


def test_input_error_is_a_value_error():
    assert issubclass(InputError, ValueError)


@pytest.mark.parametrize("lag", [0, -3])
def test_check_lag_positive(lag):
    with pytest.raises(InputError, match=rf"lag must be an integer not less than 1, but got {lag}"):
        _checks.check_lag(lag)


@pytest.mark.parametrize("dt", [0, -1.0, math.nan, math.inf, -math.inf])
def test_check_dt_finite_positive(dt):
    with pytest.raises(InputError, match=r"dt \(time between frames\) must be a finite positive number"):
        _checks.check_dt(dt)


@pytest.mark.parametrize("dt", ["1", None, True])
def test_check_dt_number(dt):
    with pytest.raises(InputError, match=r"dt \(time between frames\) must be a positive number"):
        _checks.check_dt(dt)


def test_check_dt_and_unit_accept_good_values():
    assert _checks.check_dt(0.25) == 0.25
    assert _checks.check_dt(np.float32(2)) == 2.0
    assert _checks.check_unit(" ns ") == "ns"


@pytest.mark.parametrize("unit", ["", "   ", None, 3])
def test_check_unit(unit):
    with pytest.raises(InputError, match=r"unit must be a non-empty string"):
        _checks.check_unit(unit)


def test_check_probability():
    assert _checks.check_probability(0.95, "confidence") == 0.95
    for bad in (0, 1, 1.5, -0.1):
        with pytest.raises(InputError, match=r"confidence must be strictly between 0 and 1"):
            _checks.check_probability(bad, "confidence")
    assert _checks.check_probability(0, "p", open_interval=False) == 0.0
    assert _checks.check_probability(1, "p", open_interval=False) == 1.0
    with pytest.raises(InputError, match=r"p must be a number between 0 and 1"):
        _checks.check_probability("0.5", "p")


# --------------------------------------------------------------------------- label trajectories

def test_labels_one_array_is_one_int32_run():
    runs = _checks.as_label_trajectories(np.array([0, 1, 2], dtype=np.int64))
    assert len(runs) == 1 and runs[0].dtype == np.int32 and runs[0].tolist() == [0, 1, 2]


def test_labels_flat_list_is_one_run_and_list_of_lists_is_many():
    assert [r.tolist() for r in _checks.as_label_trajectories([0, 1, -1, 1])] == [[0, 1, -1, 1]]
    runs = _checks.as_label_trajectories([[0, 1], np.array([1, 1, 0])])
    assert [r.tolist() for r in runs] == [[0, 1], [1, 1, 0]]
    assert all(r.dtype == np.int32 for r in runs)


def test_labels_whole_floats_accepted():
    runs = _checks.as_label_trajectories(np.array([0.0, 2.0, -1.0]))
    assert runs[0].dtype == np.int32 and runs[0].tolist() == [0, 2, -1]


def test_labels_error_names_the_run_among_several():
    with pytest.raises(InputError, match=r"labels\[1\] has label -5 at frame 2"):
        _checks.as_label_trajectories([np.array([0, 1]), np.array([0, 1, -5])])


def test_labels_too_large_for_int32():
    with pytest.raises(InputError, match=r"label above 2147483647"):
        _checks.as_label_trajectories(np.array([0, 2 ** 40]))


# Every bad input of the issue, at every entry point that walks over label trajectories.
# (args -> (labels, lag, keyword arguments), expected message)
BAD_LABELS = {
    "empty list": ([], r"labels is empty"),
    "empty array": (np.array([], dtype=int), r"labels holds no frames"),
    "only empty runs": ([[], []], r"labels holds no frames"),
    "non-integer float": ([0, 1.5, 1, 0], r"must hold integer state labels, but frame 1 is 1\.5"),
    "NaN": ([0.0, math.nan, 1.0], r"NaN or infinite labels"),
    "string array": (np.array(["a", "b", "a"]), r"must hold integer state labels, but holds <U1 values such as 'a'"),
    "list of strings": (["a", "b", "a"], r"must hold integer state labels, but holds <U1"),
    "one string": ("abab", r"must hold integer state labels, but got a string 'abab'"),
    "objects": ([object(), object()], r"must hold integer state labels, but holds object values"),
    "booleans": (np.array([True, False, True]), r"must hold integer state labels, but holds booleans"),
    "below -1": ([0, -2, 1, 0], r"has label -2 at frame 1; labels must be >= 0, with -1 only for unassigned"),
    "2-D array": (np.zeros((2, 5), dtype=int), r"labels must be a 1-D array .* but got an array of shape \(2, 5\)"),
    "3-D run in a list": ([np.zeros((2, 2), dtype=int)], r"must be a 1-D array of state labels, but has shape \(2, 2\)"),
    "None": (None, r"labels must be a 1-D integer array or a list of them, but got None"),
    "every frame unassigned": ([-1, -1, -1, -1], r"labels hold no assigned frame: every label is -1"),
}


def _call(entry, labels, lag, **kw):
    if entry == "count_transitions":
        kw.pop("dt", None)
        return mk.count_transitions(labels, lag, **kw)
    if entry == "build_model":
        return mk.build_model(labels, lag, **kw)
    return lag_scan(labels, [lag], **kw)


ENTRIES = ["count_transitions", "build_model", "lag_scan"]


@pytest.mark.parametrize("entry", ENTRIES)
@pytest.mark.parametrize("case", list(BAD_LABELS))
def test_bad_labels_raise_input_error(entry, case):
    labels, message = BAD_LABELS[case]
    with pytest.raises(InputError, match=message):
        _call(entry, labels, 1)


@pytest.mark.parametrize("entry", ENTRIES)
@pytest.mark.parametrize("lag, message", [
    (0, r"lags? must be (an integer not less than 1|positive integers).*0"),
    (-2, r"lags? must be (an integer not less than 1|positive integers).*-2"),
    (1.5, r"lags? must be an integer, but got 1\.5"),
    ("2", r"lags? must be an integer, but got '2'"),
    (None, r"lags? must be an integer, but got None"),
])
def test_bad_lag_raises_input_error(entry, lag, message):
    with pytest.raises(InputError, match=message):
        _call(entry, GOOD, lag)


@pytest.mark.parametrize("entry", ENTRIES)
def test_lag_longer_than_every_trajectory(entry):
    runs = [np.array([0, 1, 0, 1]), np.array([1, 0])]
    with pytest.raises(InputError, match=r"(lag must be shorter|are not shorter) than the longest trajectory \(4 frames\)"):
        _call(entry, runs, 4)
    with pytest.raises(InputError, match=r"than the longest trajectory \(4 frames\)"):
        _call(entry, runs, 9)


@pytest.mark.parametrize("entry", ["build_model", "lag_scan"])
@pytest.mark.parametrize("dt, message", [
    (0, r"dt \(time between frames\) must be a finite positive number, but got 0\.0"),
    (-0.5, r"dt .* must be a finite positive number, but got -0\.5"),
    (math.nan, r"dt .* must be a finite positive number, but got nan"),
    (math.inf, r"dt .* must be a finite positive number, but got inf"),
    ("0.1", r"dt .* must be a positive number, but got '0\.1'"),
])
def test_bad_dt_raises_input_error(entry, dt, message):
    with pytest.raises(InputError, match=message):
        _call(entry, GOOD, 1, dt=dt)


@pytest.mark.parametrize("entry", ["build_model", "lag_scan"])
def test_single_visited_state_raises_input_error(entry):
    with pytest.raises(InputError, match=r"labels visit a single state \(3\)"):
        _call(entry, [np.array([3, 3, 3, 3, -1, 3])], 1)


@pytest.mark.parametrize("entry", ENTRIES)
def test_n_states_smaller_than_largest_label(entry):
    with pytest.raises(InputError, match=r"n_states must exceed the largest label \(2\), but got 2"):
        _call(entry, GOOD, 1, n_states=2)
    with pytest.raises(InputError, match=r"n_states must be an integer not less than 1, but got 0"):
        _call(entry, GOOD, 1, n_states=0)


# --------------------------------------------------------------------------- state sets

def test_as_state_set():
    valid = np.array([3, 7, 42])
    assert _checks.as_state_set(7, "source", valid).tolist() == [7]
    assert _checks.as_state_set([42, 3, 3], "source", valid).tolist() == [3, 42]
    assert _checks.as_state_set([7.0], "source", valid).tolist() == [7]
    with pytest.raises(InputError, match=r"source names label\(s\) 5 that are not in the model's kept set"):
        _checks.as_state_set([3, 5], "source", valid)
    with pytest.raises(InputError, match=r"target is empty"):
        _checks.as_state_set([], "target", valid)
    with pytest.raises(InputError, match=r"target must hold integer state labels"):
        _checks.as_state_set([0.5], "target", valid)


# --------------------------------------------------------------------------- float trajectories

def test_float_trajectories_basic():
    runs = _checks.as_float_trajectories([np.ones((5, 2), dtype=np.float32), np.zeros((3, 2), dtype=int)])
    assert runs[0].dtype == np.float32 and runs[1].dtype == np.float64
    assert [r.shape for r in runs] == [(5, 2), (3, 2)]


@pytest.mark.parametrize("trajs, message", [
    (None, r"trajs must be a 2-D array .* but got None"),
    ("runs/*.npy", r"to read files use msmkit.load_trajectories"),
    ([], r"trajs is empty"),
    (np.ones(5), r"must be a 2-D array \(frames x features\), but has shape \(5,\) \(one feature\?"),
    ([1.0, 2.0], r"flat list of numbers"),
    ([np.ones((4, 2)), np.ones((4, 3))], r"same number of features.*trajs\[0\] has 2 and trajs\[1\] has 3"),
    ([np.ones((0, 2))], r"has no frames"),
    (np.array([["a", "b"]]), r"must hold real numbers"),
])
def test_float_trajectories_refused(trajs, message):
    with pytest.raises(InputError, match=message):
        _checks.as_float_trajectories(trajs)


def test_non_finite_frame_is_named():
    x = np.zeros((6, 3))
    x[4, 2] = np.nan
    with pytest.raises(InputError, match=r"trajs\[1\]: frame 4 has nan in feature 2"):
        _checks.as_float_trajectories([np.zeros((2, 3)), x])
    with pytest.raises(InputError, match=r"run\.npy: frame 104 has inf in feature 0 \('phi'\)"):
        block = np.zeros((5, 2))
        block[4, 0] = np.inf
        _checks.check_finite_frames(block, "run.npy", first_frame=100, feature_names=["phi", "psi"])


def test_chunk_size():
    assert _checks.check_chunk_size(None, 8) == (1 << 24) // 64
    assert _checks.check_chunk_size(None, 10 ** 9) == 1024
    with pytest.raises(InputError, match=r"chunk_size must be an integer not less than 1"):
        _checks.check_chunk_size(0, 3)


def test_require_optional_names_the_extra():
    assert _checks.require_optional("math", "x", "Testing") is math
    with pytest.raises(ImportError, match=r"pip install 'msmkit\[md\]'"):
        _checks.require_optional("no_such_module_for_msmkit_tests", "md", "Reading MD files")
    assert "no_such_module_for_msmkit_tests" not in sys.modules
