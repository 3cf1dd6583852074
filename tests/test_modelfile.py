"""Tests of msmkit.modelfile: the .npz model file.

The contract (DESIGN.md, "The model file"): plain arrays only, readable by
numpy.load(allow_pickle=False); atomic writes (temporary file in the same folder, then
os.replace); loading checks every key, shape and invariant and raises ModelFileError naming the
problem; no code from a file ever runs.
"""
import json
import os
import warnings

import numpy as np
import pytest

import msmkit as mk
from msmkit.errors import DiagnosticWarning, InputError, ModelFileError
from msmkit.model import MarkovModel, build_model, load_model
from msmkit.modelfile import FORMAT, FORMAT_VERSION, save_model


class WritesMarker:
    """A pickled object whose unpickling would create a file: proof that code from a file ran."""

    def __init__(self, path):
        self.path = str(path)

    def __reduce__(self):
        return (open, (self.path, "w"))


@pytest.fixture
def model():
    run = np.array([0, 1, 1, 0, 2, 2, 1, 0, 0, 2] * 20 + [7])  # 7: entered once, dropped
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DiagnosticWarning)
        return build_model([run, np.array([2, 1, 0, 1, 2, 2])], 2, dt=0.25, unit="ns")


def arrays_of(path):
    with np.load(path, allow_pickle=False) as npz:
        return {k: npz[k] for k in npz.files}


def write_variant(tmp_path, good_file, name, **changes):
    """A copy of a good model file with keys replaced (value) or removed (None)."""
    data = arrays_of(good_file)
    for key, value in changes.items():
        if value is None:
            data.pop(key)
        else:
            data[key] = value
    path = tmp_path / name
    np.savez(path, **data)
    return path


# --------------------------------------------------------------------------- round trip

def test_round_trip_is_exact(model, tmp_path):
    assert model.dropped_states.tolist() == [7]  # the fixture exercises the dropped-state fields
    path = model.save(tmp_path / "m.npz")
    assert path == tmp_path / "m.npz"
    back = load_model(path)
    for name in ("propagator", "equilibrium", "states", "dropped_states"):
        a, b = getattr(model, name), getattr(back, name)
        assert a.dtype == b.dtype and np.array_equal(a, b), name  # bit for bit
    np.testing.assert_array_equal(back.transition_counts.toarray(), model.transition_counts.toarray())
    assert back.transition_counts.dtype == np.int64
    assert (back.lag, back.dt, back.unit, back.reversible) == (model.lag, model.dt, model.unit, model.reversible)
    assert back.kept_fraction == model.kept_fraction
    assert back.diagnostics == model.diagnostics
    for key in ("parameters", "labels_sha256", "frames_per_run", "package_version", "created"):
        assert back.metadata[key] == model.metadata[key]
    np.testing.assert_array_equal(back.relaxation_times(), model.relaxation_times())
    # and the loaded model saves to the same arrays again
    again = back.save(tmp_path / "again.npz")
    a, b = arrays_of(path), arrays_of(again)
    assert a.keys() == b.keys()
    for key in a:
        assert np.array_equal(a[key], b[key]), key


def test_file_holds_plain_arrays_only(model, tmp_path):
    path = save_model(model, tmp_path / "m.npz")
    data = arrays_of(path)  # allow_pickle=False: would raise on any object array
    assert str(data["format"]) == FORMAT and int(data["format_version"]) == FORMAT_VERSION
    assert all(arr.dtype != object for arr in data.values())
    assert set(data) == {"format", "format_version", "propagator", "transition_counts", "equilibrium",
                         "states", "lag", "dt", "unit", "reversible", "metadata"}
    meta = json.loads(str(data["metadata"]))
    assert meta["kept_fraction"] == model.kept_fraction and meta["dropped_states"] == [7]


def test_model_from_matrix_omits_count_matrix(tmp_path):
    model = MarkovModel.from_transition_matrix([[0.9, 0.1], [0.05, 0.95]], dt=2.0, unit="fs", states=[4, 9])
    path = model.save(tmp_path / "matrix")
    assert path.name == "matrix.npz"  # suffix appended
    assert "transition_counts" not in arrays_of(path)
    back = load_model(path)
    assert back.transition_counts is None and back.states.tolist() == [4, 9] and back.unit == "fs"
    np.testing.assert_array_equal(back.propagator, model.propagator)


def test_optional_arrays_round_trip(model, tmp_path):
    rng = np.random.default_rng(0)
    extras = {"centers": rng.random((4, 3)), "tica_mean": rng.random(5), "tica_components": rng.random((3, 5)),
              "affinity": np.array([[1.0, 0.0], [0.25, 0.75], [0.0, 1.0]])}
    back = load_model(model.save(tmp_path / "m.npz", **extras))
    assert set(back.extras) == set(extras)
    for key, value in extras.items():
        np.testing.assert_array_equal(back.extras[key], value)
    # extras carried by the model are written again
    back2 = load_model(back.save(tmp_path / "m2.npz"))
    np.testing.assert_array_equal(back2.extras["centers"], extras["centers"])


def test_unknown_extra_and_missing_folder(model, tmp_path):
    with pytest.raises(InputError, match=r"unknown array\(s\) \['weights'\]"):
        model.save(tmp_path / "m.npz", weights=np.ones(3))
    with pytest.raises(InputError, match=r"folder .*nowhere does not exist"):
        model.save(tmp_path / "nowhere" / "m.npz")
    with pytest.raises(InputError, match=r"centers must be a numeric array, not Python objects"):
        model.save(tmp_path / "m.npz", centers=np.array([object()], dtype=object))
    assert os.listdir(tmp_path) == []


# --------------------------------------------------------------------------- atomic writing

def test_no_temporary_file_left(model, tmp_path):
    model.save(tmp_path / "m.npz")
    model.save(tmp_path / "m.npz")  # overwrite
    assert os.listdir(tmp_path) == ["m.npz"]


def test_saved_file_has_ordinary_permissions(model, tmp_path):
    # the temporary file is private while written; the result gets what open() would give it
    umask = os.umask(0)
    os.umask(umask)
    path = model.save(tmp_path / "m.npz")
    assert path.stat().st_mode & 0o777 == 0o666 & ~umask


def test_failed_write_keeps_the_good_file(model, tmp_path, monkeypatch):
    path = model.save(tmp_path / "m.npz")
    before = path.read_bytes()

    def broken(*args, **kwargs):
        raise OSError("disk full (simulated)")

    monkeypatch.setattr(np, "savez_compressed", broken)
    other = MarkovModel.from_transition_matrix([[0.9, 0.1], [0.05, 0.95]])
    with pytest.raises(OSError, match=r"disk full"):
        other.save(path)
    assert path.read_bytes() == before
    assert os.listdir(tmp_path) == ["m.npz"]
    monkeypatch.undo()
    np.testing.assert_array_equal(load_model(path).propagator, model.propagator)


def test_overwrite_false_refuses(model, tmp_path):
    path = model.save(tmp_path / "m.npz")
    before = path.read_bytes()
    other = MarkovModel.from_transition_matrix([[0.9, 0.1], [0.05, 0.95]])
    with pytest.raises(InputError, match=r"m\.npz exists; choose another name or pass overwrite=True"):
        other.save(path, overwrite=False)
    assert path.read_bytes() == before
    assert os.listdir(tmp_path) == ["m.npz"]
    other.save(tmp_path / "new.npz", overwrite=False)  # a new name is fine


# --------------------------------------------------------------------------- loading bad files

def test_pickled_object_is_refused_and_never_run(model, tmp_path):
    good = model.save(tmp_path / "good.npz")
    marker = tmp_path / "code-ran.txt"
    payload = np.array([WritesMarker(marker)], dtype=object)
    bad = write_variant(tmp_path, good, "bad.npz", centers=payload)
    # the payload is live: loading it the unsafe way does run it (checked on a second marker)
    probe = tmp_path / "probe-ran.txt"
    np.savez(tmp_path / "probe.npz", x=np.array([WritesMarker(probe)], dtype=object))
    with np.load(tmp_path / "probe.npz", allow_pickle=True) as npz:
        npz["x"]
    assert probe.exists()
    with pytest.raises(ModelFileError, match=r"key 'centers' holds pickled Python objects"):
        load_model(bad)
    assert not marker.exists()
    # a pickled object in a required key is refused the same way
    bad2 = write_variant(tmp_path, good, "bad2.npz", metadata=payload)
    with pytest.raises(ModelFileError, match=r"key 'metadata' holds pickled Python objects"):
        load_model(bad2)
    assert not marker.exists()


@pytest.mark.parametrize("keep_fraction", [0.5, 0.9, 0.99])
def test_truncated_file(model, tmp_path, keep_fraction):
    good = model.save(tmp_path / "good.npz")
    raw = good.read_bytes()
    bad = tmp_path / "cut.npz"
    bad.write_bytes(raw[: int(len(raw) * keep_fraction)])
    with pytest.raises(ModelFileError, match=r"cut\.npz: not a readable model file \(truncated or not \.npz\)"):
        load_model(bad)


def test_corrupted_bytes(model, tmp_path):
    good = model.save(tmp_path / "good.npz")
    raw = bytearray(good.read_bytes())
    # flip bytes inside the compressed data of the first member (after its local header)
    for k in range(60, 90):
        raw[k] ^= 0xFF
    bad = tmp_path / "flipped.npz"
    bad.write_bytes(bytes(raw))
    with pytest.raises(ModelFileError, match=r"flipped\.npz"):
        load_model(bad)


def test_not_a_model_file(tmp_path):
    text = tmp_path / "notes.npz"
    text.write_text("hello")
    with pytest.raises(ModelFileError, match=r"not a readable model file"):
        load_model(text)
    np.save(tmp_path / "plain.npy", np.eye(2))
    with pytest.raises(ModelFileError, match=r"plain\.npy: not a model file: it holds a single array"):
        load_model(tmp_path / "plain.npy")  # an .npy array is no model
    with pytest.raises(ModelFileError, match=r"no such file"):
        load_model(tmp_path / "absent.npz")


@pytest.mark.parametrize("key", ["format", "propagator", "equilibrium", "states", "lag", "dt",
                                 "unit", "reversible", "metadata", "format_version"])
def test_missing_key(model, tmp_path, key):
    bad = write_variant(tmp_path, model.save(tmp_path / "good.npz"), "bad.npz", **{key: None})
    with pytest.raises(ModelFileError, match=rf"missing key\(s\) \['{key}'\]"):
        load_model(bad)


def _broken_rows(T):
    T = T.copy()
    T[0, 0] += 0.01
    return T


def _swap_pi(pi):
    return pi[::-1].copy()


BAD_VALUES = {
    "wrong format": ({"format": np.array("some-other-model")}, r"format is 'some-other-model', expected 'msmkit-model'"),
    "format as bytes": ({"format": np.array(b"msmkit-model")}, r"format must be a string"),
    "future version": ({"format_version": np.array(FORMAT_VERSION + 1)}, r"format_version 2 is not supported"),
    "rows": ({"propagator": _broken_rows}, r"propagator rows do not sum to 1 \(worst off by 0\.01\)"),
    "negative T": ({"propagator": np.array([[1.2, -0.2, 0.0], [0.1, 0.8, 0.1], [0.0, 0.5, 0.5]])},
                   r"propagator has negative or non-finite entries"),
    "NaN T": ({"propagator": np.full((3, 3), np.nan)}, r"propagator has negative or non-finite entries"),
    "non-square": ({"propagator": lambda T: T[:2]}, r"propagator must be square, but has shape \(2, 3\)"),
    "1-D T": ({"propagator": lambda T: T.ravel()}, r"propagator must be a 2-D numeric array"),
    "pi shape": ({"equilibrium": lambda p: p[:2]}, r"equilibrium has shape \(2,\), expected \(3,\)"),
    "pi sum": ({"equilibrium": lambda p: p * 2}, r"equilibrium must be non-negative and sum to 1"),
    "pi not stationary": ({"equilibrium": _swap_pi}, r"equilibrium is not stationary"),
    "states repeat": ({"states": np.array([0, 0, 1])}, r"states must be 3 distinct integer labels"),
    "states float": ({"states": np.array([0.0, 1.0, 2.0])}, r"states must be 3 distinct integer labels"),
    "lag zero": ({"lag": np.array(0)}, r"lag must be a positive integer, got 0"),
    "lag float": ({"lag": np.array(2.0)}, r"lag must be an integer"),
    "lag array": ({"lag": np.array([2, 2])}, r"lag must be a single value, but has shape \(2,\)"),
    "dt negative": ({"dt": np.array(-1.0)}, r"dt must be a finite positive number, got -1\.0"),
    "dt nan": ({"dt": np.array(np.nan)}, r"dt must be a finite positive number, got nan"),
    "unit number": ({"unit": np.array(3)}, r"unit must be a string"),
    "reversible int": ({"reversible": np.array(1)}, r"reversible must be a boolean"),
    "metadata json": ({"metadata": np.array("{not json")}, r"metadata is not valid JSON"),
    "metadata list": ({"metadata": np.array("[1, 2]")}, r"metadata must be a JSON object"),
    "counts shape": ({"transition_counts": np.ones((2, 2), dtype=np.int64)}, r"transition_counts must be a non-negative \(3, 3\) integer array"),
    "counts float": ({"transition_counts": lambda C: C.astype(float)}, r"transition_counts must be a non-negative \(3, 3\) integer array"),
    "counts negative": ({"transition_counts": lambda C: C - 1000}, r"transition_counts must be a non-negative"),
    "affinity rows": ({"affinity": np.full((3, 2), 0.3)}, r"affinity must be \(3, m\), non-negative, rows summing to 1"),
    "centers nan": ({"centers": np.array([[np.nan]])}, r"centers must be a finite numeric array"),
    "tica mismatch": ({"tica_mean": np.zeros(4), "tica_components": np.zeros((2, 3))},
                      r"tica_components must be \(dim, n_features\) with n_features = len\(tica_mean\)"),
}


@pytest.mark.parametrize("case", list(BAD_VALUES))
def test_broken_invariant(model, tmp_path, case):
    changes, message = BAD_VALUES[case]
    good = model.save(tmp_path / "good.npz")
    data = arrays_of(good)
    changes = {k: (v(data[k]) if callable(v) else v) for k, v in changes.items()}
    bad = write_variant(tmp_path, good, "bad.npz", **changes)
    with pytest.raises(ModelFileError, match=r"bad\.npz: " + message):
        load_model(bad)


def test_load_model_is_public():
    assert mk.load_model is load_model and mk.save_model is save_model
