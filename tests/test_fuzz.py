"""Fuzz and property tests of bad input and faults: every case is refused cleanly.

Each test draws many inputs (hypothesis) or crafts the hostile case directly, and checks the
contract of the project (DEVELOPERS.md, "errors"): bad input raises InputError naming the
argument, a bad model file raises ModelFileError naming the file, nothing else escapes, no
half-written or clobbered file is left, and memory stays bounded by what is really needed.
References for the numerical checks are named beside them.
"""
from __future__ import annotations

import errno
import io
import json
import math
import multiprocessing as mp
import os
import signal
import struct
import subprocess
import sys
import textwrap
import time
import tracemalloc
import warnings
import zipfile
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

import msmkit as mk
from msmkit import modelfile
from msmkit.counts import MAX_STATES
from msmkit.errors import DiagnosticWarning, InputError, ModelFileError
from msmkit.model import MarkovModel
from msmkit.model import load_model
from msmkit.modelfile import save_model

FUZZ = settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
ROOT = Path(__file__).resolve().parents[1]


def quiet_model(T, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DiagnosticWarning)
        return MarkovModel.from_transition_matrix(T, **kw)


@pytest.fixture(scope="module")
def good_file(tmp_path_factory):
    folder = tmp_path_factory.mktemp("good")
    model = quiet_model([[0.8, 0.15, 0.05], [0.3, 0.6, 0.1], [0.1, 0.2, 0.7]], dt=0.5, unit="ns")
    return save_model(model, folder / "good.npz", centers=np.zeros((4, 2)),
                      tica_mean=np.zeros(3), tica_components=np.ones((2, 3)))


def members_of(path) -> dict:
    with zipfile.ZipFile(path) as zf:
        return {info.filename: zf.read(info) for info in zf.infolist()}


def npy_bytes(header: dict, data: bytes = b"") -> bytes:
    """An .npy member with an arbitrary header (shape, dtype) and arbitrary data."""
    buf = io.BytesIO()
    np.lib.format.write_array_header_1_0(buf, header)
    return buf.getvalue() + data


def array_bytes(arr) -> bytes:
    buf = io.BytesIO()
    np.lib.format.write_array(buf, np.asarray(arr), allow_pickle=True)
    return buf.getvalue()


def rezip(src, dst, *, replace=None, drop=(), method=zipfile.ZIP_DEFLATED) -> Path:
    members = members_of(src)
    for name in drop:
        members.pop(name, None)
    members.update(replace or {})
    with zipfile.ZipFile(dst, "w", method) as zf:
        for name, data in members.items():
            zf.writestr(name, data)
    return Path(dst)


def only_clean_failure(path):
    """load_model either returns a sound model or raises ModelFileError naming the file."""
    try:
        model = load_model(path)
    except ModelFileError as exc:
        assert str(path) in str(exc)
        return None
    assert np.allclose(model.propagator.sum(axis=1), 1.0)
    return model


# =============================================================================== model file: load

@FUZZ
@given(data=st.binary(max_size=400))
def test_load_random_bytes(tmp_path, data):
    path = tmp_path / "random.npz"
    path.write_bytes(data)
    with pytest.raises(ModelFileError):
        load_model(path)


@FUZZ
@given(flips=st.lists(st.tuples(st.floats(0, 1, exclude_max=True), st.integers(1, 255)), max_size=6),
       keep=st.floats(0.0, 1.0))
def test_load_damaged_good_file(tmp_path, good_file, flips, keep):
    raw = bytearray(good_file.read_bytes())
    for where, mask in flips:
        raw[int(where * len(raw))] ^= mask
    path = tmp_path / "damaged.npz"
    path.write_bytes(bytes(raw[: max(1, int(keep * len(raw))) if keep < 1 else len(raw)]))
    only_clean_failure(path)


MEMBER_DTYPES = st.sampled_from(["?", "i1", "u1", "<i4", ">i8", "<u8", "<f2", ">f4", "<f8", "<c16", "<U3",
                                 "S3", "<M8[s]", "<m8[s]"])


@FUZZ
@given(key=st.sampled_from(modelfile.REQUIRED_KEYS + modelfile.OPTIONAL_KEYS + (modelfile.COUNTS_KEY,)),
       value=MEMBER_DTYPES.flatmap(lambda dt: hnp.arrays(np.dtype(dt), hnp.array_shapes(min_dims=0, max_dims=3,
                                                                                          max_side=4))))
def test_load_any_array_in_any_key(tmp_path, good_file, key, value):
    path = rezip(good_file, tmp_path / "swapped.npz", replace={f"{key}.npy": array_bytes(value)})
    only_clean_failure(path)


@pytest.mark.parametrize("key", ["format", "unit", "metadata"])
def test_load_bytes_member_is_refused(tmp_path, good_file, key):
    path = rezip(good_file, tmp_path / "bytes.npz", replace={f"{key}.npy": array_bytes(np.bytes_(b"msmkit-model"))})
    with pytest.raises(ModelFileError, match=rf"bytes\.npz: {key} must be a string"):
        load_model(path)


SHAPES = st.one_of(
    st.tuples(st.integers(-2 ** 63, 2 ** 63)),
    st.tuples(st.integers(-10, 2 ** 62), st.integers(-10, 2 ** 62)),
    st.sampled_from([(10 ** 12,), (2 ** 62, 4), (-5, 3), (2 ** 32, 2 ** 32), (0, 3), (3, -3)]),
)


@FUZZ
@given(key=st.sampled_from(["propagator", "equilibrium", "states", "lag", "centers", "metadata", "weights"]),
       shape=SHAPES)
def test_load_declared_shapes_checked_before_allocating(tmp_path, good_file, key, shape):
    """A header may declare any shape: refused (or skipped, for an unknown key) before any
    allocation; the (2**62, 4) product no longer overflows to 0 and (-5, 3) is no frame count."""
    member = npy_bytes({"descr": "<f8", "fortran_order": False, "shape": shape}, b"\0" * 64)
    path = rezip(good_file, tmp_path / "shape.npz", replace={f"{key}.npy": member})
    tracemalloc.start()
    try:
        if key == "weights":
            load_model(path)  # unknown member: skipped unread
        else:
            with pytest.raises(ModelFileError, match=rf"shape\.npz: key '{key}' declares"):
                load_model(path)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < 8 << 20


def test_load_header_of_10_to_12_elements(tmp_path, good_file):
    member = npy_bytes({"descr": "<f8", "fortran_order": False, "shape": (10 ** 6, 10 ** 6)})
    path = rezip(good_file, tmp_path / "huge.npz", replace={"propagator.npy": member})
    with pytest.raises(ModelFileError, match=r"key 'propagator' declares shape \(1000000, 1000000\) of float64 "
                                             r"\(7.28 TiB\), above the limit of 1 GiB"):
        load_model(path)


def _patch_method(raw: bytes, name: str, method: int | None = None, flag: int | None = None) -> bytes:
    """Set the compression method / flag bits of member ``name`` in both zip headers."""
    raw = bytearray(raw)
    local = raw.find(b"PK\x03\x04" + b"")
    for sig, off_flag, off_method, off_name in ((b"PK\x03\x04", 6, 8, 30), (b"PK\x01\x02", 8, 10, 46)):
        pos = raw.find(sig)
        while pos >= 0:
            if raw[pos + off_name: pos + off_name + len(name)] == name.encode():
                if method is not None:
                    raw[pos + off_method: pos + off_method + 2] = struct.pack("<H", method)
                if flag is not None:
                    value = struct.unpack("<H", raw[pos + off_flag: pos + off_flag + 2])[0] | flag
                    raw[pos + off_flag: pos + off_flag + 2] = struct.pack("<H", value)
            pos = raw.find(sig, pos + 4)
    del local
    return bytes(raw)


@pytest.mark.parametrize("method", [1, 6, 9, 12, 14, 93, 95, 98, 99])
def test_load_unsupported_compression(tmp_path, good_file, method):
    raw = _patch_method(good_file.read_bytes(), "propagator.npy", method=method)
    path = tmp_path / "method.npz"
    path.write_bytes(raw)
    with pytest.raises(ModelFileError, match=rf"method\.npz: key 'propagator' uses zip compression method "
                                             rf"{method}; numpy writes deflate"):
        load_model(path)


@pytest.mark.parametrize("method", [zipfile.ZIP_BZIP2, zipfile.ZIP_LZMA])
def test_load_other_real_compressions(tmp_path, good_file, method):
    path = rezip(good_file, tmp_path / "other.npz", method=method)
    with pytest.raises(ModelFileError, match=r"uses zip compression method"):
        load_model(path)


def test_load_encrypted_member(tmp_path, good_file):
    path = tmp_path / "locked.npz"
    path.write_bytes(_patch_method(good_file.read_bytes(), "metadata.npy", flag=0x1))
    with pytest.raises(ModelFileError, match=r"locked\.npz: key 'metadata' is encrypted"):
        load_model(path)


@FUZZ
@given(value=st.one_of(st.none(), st.integers(), st.floats(), st.lists(st.integers(), max_size=2),
                       st.dictionaries(st.text(max_size=2), st.integers(), max_size=1), st.just(object())))
def test_load_model_path_types(value):
    with pytest.raises(InputError, match=r"path must be a file path \(str or pathlib.Path\)"):
        load_model(value)


def test_load_model_bytes_path(good_file):
    assert load_model(os.fsencode(str(good_file))).n_states == 3
    with pytest.raises(ModelFileError, match="no such file"):
        load_model(b"/nonexistent/model.npz")


def _deflated_zeros(zf: zipfile.ZipFile, name: str, header: dict, nbytes: int) -> None:
    with zf.open(name, "w", force_zip64=True) as fh:
        fh.write(npy_bytes(header))
        chunk = bytes(1 << 20)
        for start in range(0, nbytes, len(chunk)):
            fh.write(chunk[: min(len(chunk), nbytes - start)])


def _with_bomb(good_file, dst, name, header, nbytes) -> Path:
    members = members_of(good_file)
    members.pop(name, None)
    with zipfile.ZipFile(dst, "w", zipfile.ZIP_DEFLATED) as zf:
        for member, data in members.items():
            zf.writestr(member, data)
        _deflated_zeros(zf, name, header, nbytes)
    return Path(dst)


def _peak_while(fn):
    tracemalloc.start()
    try:
        result = fn()
        return result, tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()


def test_unknown_member_is_skipped_unread(tmp_path, good_file):
    """A 64 MiB member under an unknown name (about 64 KiB on disk) is never decompressed."""
    path = _with_bomb(good_file, tmp_path / "extra.npz", "weights.npy",
                      {"descr": "<f8", "fortran_order": False, "shape": (8 << 20,)}, 64 << 20)
    assert path.stat().st_size < 1 << 20
    model, peak = _peak_while(lambda: load_model(path))
    assert model.n_states == 3 and "weights" not in model.extras
    assert peak < 4 << 20


def test_zip_bomb_refused_before_decompressing(tmp_path, good_file, monkeypatch):
    """A member inflating to 64 MiB over a limit of 16 MiB is refused from the declared size, with
    no more memory than a few headers (the limit is lowered so that the bomb stays small)."""
    monkeypatch.setattr(modelfile, "MAX_ARRAY_BYTES", 16 << 20)
    path = _with_bomb(good_file, tmp_path / "bomb.npz", "propagator.npy",
                      {"descr": "<f8", "fortran_order": False, "shape": (2896, 2896)}, 2896 * 2896 * 8)
    with pytest.raises(ModelFileError, match=r"bomb\.npz: key 'propagator' declares shape \(2896, 2896\) of "
                                             r"float64 \(64 MiB\), above the limit of 16 MiB"):
        _peak_while(lambda: load_model(path))
    _, peak = _peak_while(lambda: pytest.raises(ModelFileError, load_model, path))
    assert peak < 4 << 20


def test_metadata_bomb_refused(tmp_path, good_file, monkeypatch):
    monkeypatch.setattr(modelfile, "MAX_SCALAR_BYTES", 1 << 20)
    path = _with_bomb(good_file, tmp_path / "meta.npz", "metadata.npy",
                      {"descr": "<U2000000", "fortran_order": False, "shape": ()}, 8_000_000)
    with pytest.raises(ModelFileError, match=r"key 'metadata' declares shape \(\) of <U2000000 \(7.63 MiB\), "
                                             r"above the limit of 1 MiB"):
        load_model(path)


def test_mismatched_declared_shapes_refused_before_reading(tmp_path, good_file):
    member = array_bytes(np.full(5, 0.2))
    path = rezip(good_file, tmp_path / "pi.npz", replace={"equilibrium.npy": member})
    with pytest.raises(ModelFileError, match=r"pi\.npz: equilibrium has shape \(5,\), expected \(3,\)"):
        load_model(path)


# =============================================================================== model file: save

def _bad_metadata():
    return st.sampled_from([object(), {1, 2}, b"raw", np.array([object()], dtype=object), lambda: 0,
                            complex(1, 2)])


CORRUPTIONS = {
    "propagator": st.sampled_from([np.full((3, 3), np.nan), np.eye(2), np.ones((3, 3)), "T"]),
    "equilibrium": st.sampled_from([np.full(3, np.nan), np.ones(3), np.array([0.5, 0.5])]),
    "states": st.sampled_from([np.zeros(3, int), np.array([0.0, 1.0, 2.0]), np.arange(4)]),
    "lag": st.sampled_from([0, -1, 2.5, "1", None, np.nan]),
    "dt": st.sampled_from([0.0, -1.0, np.nan, np.inf, "1", None]),
    "unit": st.sampled_from(["", 3, None, "  "]),
    "reversible": st.sampled_from(["False", "no", 1, None, np.array([True, False])]),
}
EXTRAS = st.sampled_from([
    {"centers": np.array([[np.nan, 0.0]])},
    {"centers": np.zeros(3)},
    {"tica_mean": np.zeros(4), "tica_components": np.zeros((2, 3))},
    {"tica_mean": np.zeros(3)},
    {"affinity": np.full((3, 2), 0.3)},
    {"affinity": np.ones((2, 1))},
    {"centers": np.array([[True, False]])},
    {"centers": np.zeros((4, 3)), "tica_mean": np.zeros(5), "tica_components": np.zeros((2, 5))},
])


@settings(max_examples=120, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(attr=st.sampled_from(sorted(CORRUPTIONS)), data=st.data(), extras=st.one_of(st.none(), EXTRAS),
       metadata=st.one_of(st.none(), _bad_metadata()))
def test_save_never_writes_what_load_refuses(tmp_path_factory, attr, data, extras, metadata):
    folder = tmp_path_factory.mktemp("save")
    model = quiet_model([[0.8, 0.2, 0.0], [0.1, 0.8, 0.1], [0.0, 0.2, 0.8]])
    if data.draw(st.booleans()):
        setattr(model, attr, data.draw(CORRUPTIONS[attr]))
    if metadata is not None:
        model.metadata["note"] = metadata
    try:
        path = save_model(model, folder / "m.npz", **(extras or {}))
    except InputError:
        assert os.listdir(folder) == []  # nothing written, not even a temporary file
        return
    load_model(path)  # what was written loads again
    assert os.listdir(folder) == ["m.npz"]


def test_save_messages_name_the_problem(tmp_path):
    model = quiet_model([[0.9, 0.1], [0.2, 0.8]])
    model.lag = 0
    with pytest.raises(InputError, match=r"cannot save .*m\.npz: lag must be a positive integer, got 0; "
                                         r"the file was not written"):
        model.save(tmp_path / "m.npz")
    model.lag = 1
    model.metadata["when"] = object()
    with pytest.raises(InputError, match=r"model.metadata must hold only JSON values"):
        model.save(tmp_path / "m.npz")
    del model.metadata["when"]
    with pytest.raises(InputError, match=r"tica_components must be \(dim, n_features\)"):
        model.save(tmp_path / "m.npz", tica_mean=np.zeros(4), tica_components=np.zeros((2, 3)))
    with pytest.raises(InputError, match=r"path must be a file path"):
        model.save(None)
    assert os.listdir(tmp_path) == []


def test_save_through_a_symlink_writes_the_target(tmp_path):
    model = quiet_model([[0.9, 0.1], [0.2, 0.8]])
    real = tmp_path / "store" / "real.npz"
    real.parent.mkdir()
    model.save(real)
    link = tmp_path / "link.npz"
    link.symlink_to(real)
    other = quiet_model([[0.5, 0.5], [0.5, 0.5]])
    assert other.save(link) == link
    assert link.is_symlink() and os.readlink(link) == str(real)
    np.testing.assert_array_equal(load_model(real).propagator, other.propagator)
    assert sorted(os.listdir(real.parent)) == ["real.npz"] and sorted(os.listdir(tmp_path)) == ["link.npz", "store"]


def _race_save(path, value, barrier, results):
    model = quiet_model([[1 - value, value], [value, 1 - value]])
    barrier.wait()
    try:
        save_model(model, path, overwrite=False)
        results.put(("saved", value))
    except InputError as exc:
        results.put(("refused", str(exc)))


def test_save_overwrite_false_is_race_free(tmp_path):
    """Two processes save to one new name at the same instant, 8 rounds: exactly one wins and the
    file holds the winner's model (before: the second replaced the first in 7 of 8 rounds)."""
    ctx = mp.get_context("fork")
    for round_ in range(8):
        path = tmp_path / f"race{round_}.npz"
        barrier, results = ctx.Barrier(2), ctx.Queue()
        procs = [ctx.Process(target=_race_save, args=(path, v, barrier, results)) for v in (0.1, 0.3)]
        for p in procs:
            p.start()
        outcome = [results.get(timeout=60) for _ in procs]
        for p in procs:
            p.join(60)
        saved = [v for kind, v in outcome if kind == "saved"]
        refused = [v for kind, v in outcome if kind == "refused"]
        assert len(saved) == 1 and len(refused) == 1, outcome
        assert "exists; choose another name or pass overwrite=True" in refused[0]
        assert load_model(path).propagator[0, 1] == pytest.approx(saved[0])
    assert not [n for n in os.listdir(tmp_path) if n.endswith(".tmp")]


SLOW_SAVE = textwrap.dedent("""
    import sys, time, warnings
    import numpy as np
    sys.path.insert(0, {root!r})
    import msmkit as mk
    warnings.simplefilter("ignore")
    model = mk.MarkovModel.from_transition_matrix([[0.9, 0.1], [0.2, 0.8]])
    def slow(fh, **arrays):
        fh.write(b"partial data")
        fh.flush()
        open({ready!r}, "w").close()
        time.sleep(60)
    np.savez_compressed = slow
    model.save({target!r})
""")


@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGKILL])
def test_killed_save_leaves_no_stale_temporary(tmp_path, sig):
    folder = tmp_path / "out"
    folder.mkdir()
    ready = tmp_path / "ready"
    script = SLOW_SAVE.format(root=str(ROOT), ready=str(ready), target=str(folder / "m.npz"))
    proc = subprocess.Popen([sys.executable, "-c", script])
    try:
        deadline = time.monotonic() + 60
        while not ready.exists():
            assert proc.poll() is None and time.monotonic() < deadline, "the save did not start"
            time.sleep(0.02)
        assert [n for n in os.listdir(folder) if n.endswith(".tmp")]  # mid-save: the temporary exists
        proc.send_signal(sig)
        assert proc.wait(60) == -sig
    finally:
        if proc.poll() is None:
            proc.kill()
    left = [n for n in os.listdir(folder) if n.endswith(".tmp")]
    if sig == signal.SIGTERM:
        assert left == []  # removed by the process itself before it ended
    else:
        assert len(left) == 1  # SIGKILL cannot be caught ...
    quiet_model([[0.9, 0.1], [0.2, 0.8]]).save(folder / "other.npz")
    assert os.listdir(folder) == ["other.npz"]  # ... and the next save into the folder removes it
    assert not (folder / "m.npz").exists()


def test_sweep_keeps_temporaries_of_running_writers(tmp_path):
    live = tmp_path / f".m.npz.{os.getpid()}.abcd.tmp"
    live.write_bytes(b"in progress")
    dead_pid = 2 ** 22 + 12345  # above the usual pid_max of 4194304
    dead = tmp_path / f".m.npz.{dead_pid}.abcd.tmp"
    dead.write_bytes(b"left behind")
    unrelated = tmp_path / ".notes.tmp"
    unrelated.write_bytes(b"not ours")
    modelfile.sweep_stale_temporaries(tmp_path)
    assert live.exists() and unrelated.exists() and not dead.exists()


# =============================================================================== settings

def _labels():
    rng = np.random.default_rng(3)
    return [rng.integers(0, 3, 400) for _ in range(6)]


NOT_BOOL = st.one_of(st.text(max_size=5), st.integers(), st.floats(), st.none(), st.just([True]))
BAD_TOL = st.one_of(st.floats(max_value=0.0), st.just(float("nan")), st.just(float("inf")), st.text(max_size=3),
                    st.none(), st.booleans())
BAD_SEED = st.one_of(st.integers(max_value=-1), st.integers(min_value=2 ** 63),
                     st.floats().filter(lambda x: not (math.isfinite(x) and x == int(x) and x >= 0)),
                     st.text(max_size=3), st.booleans(), st.just([1]))


@FUZZ
@given(value=NOT_BOOL, which=st.sampled_from(["reversible", "every_frame"]))
def test_build_model_switches_must_be_booleans(value, which):
    with pytest.raises(InputError, match=rf"{which} must be True or False"):
        mk.build_model(_labels(), 1, **{which: value})


@pytest.mark.parametrize("call", [
    lambda v: mk.count_transitions([0, 1, 0], 1, every_frame=v),
    lambda v: mk.estimate_transition_matrix(np.array([[2, 1], [1, 2]]), reversible=v),
    lambda v: mk.lag_scan(_labels(), [1, 2], reversible=v),
    lambda v: mk.splitting_probability(np.full((3, 3), 1 / 3), [0], [2], reverse_time=v),
    lambda v: quiet_model([[0.9, 0.1], [0.2, 0.8]], reversible=v),
    lambda v: quiet_model([[0.9, 0.1], [0.2, 0.8]]).find_macrostates(2, optimize=v),
])
@pytest.mark.parametrize("value", ["False", "no", 1, 0.0])
def test_other_switches_must_be_booleans(call, value):
    with pytest.raises(InputError, match=r"must be True or False"):
        call(value)


@FUZZ
@given(tol=BAD_TOL)
def test_tolerances_positive_and_finite(tol):
    with pytest.raises(InputError, match=r"tol must be a (finite number greater than 0|positive number)"):
        mk.estimate_transition_matrix(np.array([[5, 1], [2, 7]]), tol=tol)
    with pytest.raises(InputError, match=r"rtol must be a (finite number greater than 0|positive number)"):
        mk.lag_scan(_labels(), [1, 2], rtol=tol)


@FUZZ
@given(seed=BAD_SEED)
def test_seeds_valid(seed):
    with pytest.raises(InputError, match=r"seed must be an integer"):
        mk.lag_scan(_labels(), [1, 2], n_samples=2, seed=seed)
    model = _quiet_build(_labels())
    with pytest.raises(InputError, match=r"seed must be an integer"):
        mk.sample_models(model, _labels(), n_samples=2, seed=seed)


def test_good_settings_still_accepted():
    scan = mk.lag_scan(_labels(), [1, 2], n_samples=2, seed=np.int64(4), rtol=0.1, reversible=np.bool_(True))
    again = mk.lag_scan(_labels(), [1, 2], n_samples=2, seed=4, rtol=0.1)
    np.testing.assert_array_equal(scan.timescales, again.timescales)


def test_reversible_true_refused_for_a_non_reversible_matrix():
    # a cyclic drift 0 -> 1 -> 2 -> 0: pi is uniform, pi_0 T_01 = 0.6 / 3 != pi_1 T_10 = 0.1 / 3
    T = np.array([[0.3, 0.6, 0.1], [0.1, 0.3, 0.6], [0.6, 0.1, 0.3]])
    with pytest.raises(InputError, match=r"reversible=True, but propagator does not obey detailed balance"):
        quiet_model(T, reversible=True)
    model = quiet_model(T)
    assert not model.reversible
    # exact eigenvalues of this circulant matrix: c0 + c1 w + c2 w^2 with w = exp(2 pi i k / 3)
    w = np.exp(2j * np.pi * np.arange(3) / 3)
    exact = 0.3 + 0.6 * w + 0.1 * w ** 2
    got = model.spectrum()
    assert np.allclose(sorted(got, key=lambda z: (round(abs(z), 9), z.imag)),
                       sorted(exact, key=lambda z: (round(abs(z), 9), z.imag)))


@FUZZ
@given(T=st.one_of(st.just("abc"), st.just([[np.nan, 1.0], [0.5, 0.5]]), st.just(np.ones((2, 3)) / 3),
                   st.just([[1.0]]), st.lists(st.text(max_size=2), min_size=1, max_size=3)),
       pi=st.one_of(st.none(), st.just(np.ones(5) / 5), st.just(["a", "b"]), st.just([np.nan, 1.0])))
def test_spectral_helpers_raise_input_error(T, pi):
    for call in (lambda: mk.equilibrium_distribution(T), lambda: mk.eigen_decomposition(T, pi)):
        try:
            call()
        except InputError:
            pass
    with pytest.raises(InputError):
        mk.eigen_decomposition(np.eye(2) * 0.5 + 0.25, pi if pi is not None else "x")
    with pytest.raises(InputError):
        mk.implied_timescales(["a"], 1)
    with pytest.raises(InputError):
        mk.implied_timescales([0.5, np.nan], 1)
    with pytest.raises(InputError, match="lag"):
        mk.implied_timescales([0.5], 0)


def test_spectral_helpers_refuse_strings_nan_and_shapes():
    for T in ("abc", [[np.nan, 1.0], [0.5, 0.5]], np.ones((2, 3)) / 3, [["a", "b"], ["c", "d"]]):
        with pytest.raises(InputError, match=r"^T "):
            mk.equilibrium_distribution(T)
        with pytest.raises(InputError, match=r"^T "):
            mk.eigen_decomposition(T)
    with pytest.raises(InputError, match=r"pi must have one entry per state of T \(2\)"):
        mk.eigen_decomposition([[0.5, 0.5], [0.5, 0.5]], np.ones(3) / 3)


# =============================================================================== counting

def _reference_counts(runs, lag, every_frame):
    """Counts by a plain dictionary over the pairs (common practice), as {(i, j): n}."""
    out = {}
    for r in runs:
        step = 1 if every_frame else lag
        for t in range(0, len(r) - lag, step):
            i, j = int(r[t]), int(r[t + lag])
            if i >= 0 and j >= 0:
                out[(i, j)] = out.get((i, j), 0) + 1
    return out


@FUZZ
@given(runs=st.lists(st.lists(st.one_of(st.integers(-1, 3), st.sampled_from([100_000, 2 ** 23, MAX_STATES - 1])),
                              min_size=2, max_size=40), min_size=1, max_size=3),
       lag=st.integers(1, 3), every_frame=st.booleans())
def test_sparse_counts_match_the_pairs(runs, lag, every_frame):
    assume(max(len(r) for r in runs) > lag and any(x >= 0 for r in runs for x in r))
    ref = _reference_counts(runs, lag, every_frame)
    C = mk.count_transitions([np.array(r) for r in runs], lag, every_frame=every_frame).tocoo()
    got = {(int(i), int(j)): int(v) for i, j, v in zip(C.row, C.col, C.data) if v}
    assert got == ref


def test_counting_memory_follows_pairs_not_labels():
    C, peak = _peak_while(lambda: mk.count_transitions([0, 100_000, 0, 100_000], 1))
    assert C.shape == (100_001, 100_001) and C[0, 100_000] == 2 and C[100_000, 0] == 1 and C.nnz == 2
    assert peak < 8 << 20  # the dense matrix would take 74.5 GiB
    # a model over labels up to 10**6: a few vectors of one entry per label (the CSR row pointers),
    # no n x n array (8 TB dense)
    model, peak = _peak_while(lambda: _quiet_build([np.array([0, 10 ** 6, 0, 10 ** 6, 10 ** 6, 0] * 50)]))
    assert model.states.tolist() == [0, 10 ** 6] and peak < 100 << 20


def _quiet_build(runs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DiagnosticWarning)
        return mk.build_model(runs, 1)


def test_largest_labels_refused_clearly():
    with pytest.raises(InputError, match=r"labels go up to 2147483647, .* renumber the visited states"):
        mk.count_transitions([0, 2 ** 31 - 1, 0], 1)
    with pytest.raises(InputError, match=r"n_states must be an integer not greater than"):
        mk.count_transitions([0, 1, 0], 1, n_states=2 ** 40)
    with pytest.raises(InputError, match=r"has a label above 2147483647"):
        mk.count_transitions([0, 2 ** 31, 0], 1)


# =============================================================================== numerics

@FUZZ
@given(log_e=st.floats(-18, -3))
def test_sticky_symmetric_chain(log_e):
    """Symmetric T: pi = (1/2, 1/2) exactly (detailed balance, common practice), at any stickiness."""
    e = 10.0 ** log_e
    T = np.array([[1 - e, e], [e, 1 - e]])
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        model = MarkovModel.from_transition_matrix(T)
    np.testing.assert_allclose(model.equilibrium, [0.5, 0.5], rtol=0, atol=1e-15)
    np.testing.assert_allclose(mk.equilibrium_distribution(T), [0.5, 0.5], rtol=0, atol=1e-15)
    assert not any("never exchange" in str(w.message) for w in caught)


@FUZZ
@given(rates=st.lists(st.tuples(st.floats(-17, -1), st.floats(-17, -1)), min_size=1, max_size=8))
def test_birth_death_chain_stationary_distribution(rates):
    """Birth-death chain: pi_{i+1} / pi_i = p_i / q_{i+1} (detailed balance, exact; common practice)."""
    up = np.array([10.0 ** a for a, _ in rates])
    down = np.array([10.0 ** b for _, b in rates])
    n = up.size + 1
    T = np.zeros((n, n))
    T[np.arange(n - 1), np.arange(1, n)] = up
    T[np.arange(1, n), np.arange(n - 1)] = down
    T[np.diag_indices(n)] = 1 - T.sum(axis=1)
    log_pi = np.concatenate(([0.0], np.cumsum(np.log(up) - np.log(down))))
    exact = np.exp(log_pi - log_pi.max())
    exact /= exact.sum()
    got = mk.equilibrium_distribution(T)
    np.testing.assert_allclose(got, exact, rtol=1e-10, atol=1e-300)


@FUZZ
@given(n=st.integers(2, 6), diag=st.integers(10, 10 ** 17), off=st.integers(1, 5))
def test_symmetric_equal_row_counts_give_uniform_pi(n, diag, off):
    """Counts with C = C^T and equal row sums: the reversible MLE is C / row sum with uniform pi
    (Bowman et al. 2009: symmetric counts already satisfy the fixed point)."""
    C = np.full((n, n), off, dtype=np.int64)
    np.fill_diagonal(C, diag)
    for reversible in (True, False):
        T, info = mk.estimate_transition_matrix(C, reversible=reversible, return_info=True)
        np.testing.assert_allclose(info.equilibrium, np.full(n, 1 / n), rtol=1e-12)


@FUZZ
@given(seed=st.integers(0, 2 ** 32 - 1), stay=st.floats(0.0, 0.999), lag=st.integers(1, 12),
       every_frame=st.booleans(), n=st.sampled_from([3, 40, 3000]), holes=st.booleans())
def test_counts_by_stretches_match_numpy(seed, stay, lag, every_frame, n, holes):
    """Sticky and non-sticky runs (both tally paths, dense and sparse) against np.add.at over the
    pairs (common practice)."""
    rng = np.random.default_rng(seed)
    runs = []
    for size in rng.integers(lag + 2, 3000, 3):
        jumps = rng.random(size) >= stay
        jumps[0] = True
        run = rng.integers(0, n, size)[np.maximum.accumulate(np.where(jumps, np.arange(size), 0))]
        if holes:
            run[rng.random(size) < 0.01] = -1
        runs.append(run)
    assume(any((r >= 0).any() for r in runs))
    ref = np.zeros((n, n), dtype=np.int64)
    step = 1 if every_frame else lag
    for r in runs:
        a, b = r[:-lag:step], r[lag::step]
        ok = (a >= 0) & (b >= 0)
        np.add.at(ref, (a[ok], b[ok]), 1)
    got = mk.count_transitions(runs, lag, n_states=n, every_frame=every_frame)
    np.testing.assert_array_equal(got.toarray(), ref)


# =============================================================================== dask

def _tcp_server(payload: bytes):
    """A TCP server on 127.0.0.1 that accepts, sends ``payload`` (maybe nothing) and then stays silent."""
    import socket
    import threading
    sock = socket.socket()
    sock.bind(("127.0.0.1", 0))
    sock.listen(8)
    held = []

    def serve():
        while True:
            try:
                conn, _ = sock.accept()
            except OSError:
                return
            held.append(conn)
            if payload:
                conn.sendall(payload)

    threading.Thread(target=serve, daemon=True).start()
    return sock


@pytest.mark.parametrize("payload, message", [
    (b"", r"accepts connections but sent nothing within 1 s"),
    (b"\xff" * 64, r"does not speak the dask protocol"),
    (b"HTTP/1.1 200 OK\r\n\r\n", r"does not speak the dask protocol"),
])
def test_connect_to_a_server_that_is_no_scheduler(payload, message):
    pytest.importorskip("distributed")
    from msmkit.distributed import connect
    sock = _tcp_server(payload)
    try:
        start = time.monotonic()
        with pytest.raises(InputError, match=message):
            connect(f"tcp://127.0.0.1:{sock.getsockname()[1]}", timeout=1)
        assert time.monotonic() - start < 5  # before: no return within 200 s, or a MemoryError of 3 EiB
    finally:
        sock.close()


def test_lost_worker_during_scatter_is_a_cluster_error(monkeypatch):
    """The mapping only: a scatter failing with dask's CommClosedError (what a worker killed mid-send
    gives) becomes ClusterError. Killing a real worker at that instant is not reproduced here."""
    distributed = pytest.importorskip("distributed")
    from distributed.comm.core import CommClosedError

    from msmkit import distributed as dist

    class Dying:
        def scatter(self, *args, **kwargs):
            raise CommClosedError("in <TCP (closed) ...>: Stream is closed")

    from msmkit import _execution

    monkeypatch.setattr(_execution, "check_client", lambda client: client)
    with pytest.raises(dist.ClusterError, match=r"sending 2 in-memory run\(s\) to the workers failed "
                                                r"\(CommClosedError"):
        _execution.place([np.zeros(3, np.int32), np.ones(4, np.int32)], Dying())
    del distributed


def test_every_public_name_exists():
    """``from msmkit import *`` must not fail on a name listed in __all__ but not defined."""
    missing = [name for name in mk.__all__ if not hasattr(mk, name)]
    assert missing == []


# =============================================================================== readers
# Contract (DEVELOPERS.md, "errors"; msmkit.io docstring): a trajectory file either loads to
# finite 2-D float runs equal to what was written, or raises InputError naming the file.
# Every run is read to the end, so lazy formats (.npy, HDF5) are checked too.

READER_SUFFIXES = (".npy", ".npz", ".csv", ".tsv", ".h5")
MAGICS = (b"", b"\x93NUMPY\x01\x00", b"\x93NUMPY\x02\x00", b"PK\x03\x04", b"PK\x05\x06",
          b"\x89HDF\r\n\x1a\n", b"\xef\xbb\xbf", b"a,b\n")
_serial = iter(range(10 ** 9))


def fresh(folder: Path, suffix: str) -> Path:
    """A new file name per example (h5py and the OS may cache an overwritten file)."""
    return folder / f"f{next(_serial)}{suffix}"


def load_or_clean_failure(path, **options):
    """Runs of ``path`` read to the end, or None after an InputError that names the file."""
    try:
        trajs = mk.load_trajectories(path, **options)
        runs = [np.asarray(r) for r in trajs]
    except InputError as exc:
        assert Path(path).name in str(exc), str(exc)
        assert "\n" not in str(exc).strip(), str(exc)
        return None
    for r in runs:
        assert r.ndim == 2 and r.shape[0] >= 1 and r.shape[1] >= 1
        assert r.dtype.kind == "f" and np.isfinite(r).all()
    assert len(trajs.feature_names) == runs[0].shape[1]
    return runs


@FUZZ
@given(prefix=st.sampled_from(MAGICS), data=st.binary(max_size=3000),
       suffix=st.sampled_from(READER_SUFFIXES))
def test_readers_on_random_bytes(tmp_path, prefix, data, suffix):
    path = fresh(tmp_path, suffix)
    path.write_bytes(prefix + data)
    load_or_clean_failure(path)


def _valid_files(folder: Path, arr: np.ndarray) -> dict:
    """One well-formed file of every feature format holding ``arr`` (frames x 3)."""
    import h5py
    import pandas as pd

    out = {}
    np.save(folder / "v.npy", arr)
    np.save(folder / "vf.npy", np.asfortranarray(arr))
    np.savez(folder / "v.npz", run=arr, feature_names=np.array(["a", "b", "c"]))
    np.savez_compressed(folder / "vc.npz", run=arr)
    frame = pd.DataFrame(arr, columns=["a", "b", "c"])
    frame.to_csv(folder / "v.csv", index=False)
    frame.to_csv(folder / "v.tsv", sep="\t", index=False)
    with h5py.File(folder / "v.h5", "w") as fh:
        fh.create_dataset("run", data=arr)
    for name in ("v.npy", "vf.npy", "v.npz", "vc.npz", "v.csv", "v.tsv", "v.h5"):
        out[name] = (folder / name).read_bytes()
    return out


class _Quiet(tuple):
    """A fixture value that hypothesis reports by name, not by the many bytes it holds."""

    def __repr__(self):
        return "<fixture>"


@pytest.fixture(scope="module")
def valid_reader_files(tmp_path_factory):
    arr = np.random.default_rng(3).normal(size=(40, 3)).round(6)
    return _Quiet((arr, _valid_files(tmp_path_factory.mktemp("valid"), arr)))


@FUZZ
@given(which=st.sampled_from(("v.npy", "vf.npy", "v.npz", "vc.npz", "v.csv", "v.tsv", "v.h5")),
       cut=st.floats(0, 1, exclude_max=True))
def test_readers_on_truncated_files(tmp_path, valid_reader_files, which, cut):
    """A file cut short is refused; only text may load, and then as the whole rows before the cut
    (a text file cannot tell a shorter run from a cut one, common practice)."""
    arr, raw = valid_reader_files
    blob = raw[which]
    path = fresh(tmp_path, Path(which).suffix)
    path.write_bytes(blob[:int(cut * len(blob))])
    runs = load_or_clean_failure(path)
    if runs is None:
        return
    assert Path(which).suffix in (".csv", ".tsv"), f"{which} cut at {cut:.3f} loaded"
    (run,) = runs
    assert run.shape[1] == 3 and np.array_equal(run[:-1], arr[:len(run) - 1])


@FUZZ
@given(which=st.sampled_from(("v.npy", "vf.npy", "v.npz", "vc.npz", "v.csv", "v.tsv", "v.h5")),
       flips=st.lists(st.tuples(st.floats(0, 1, exclude_max=True), st.integers(1, 255)),
                      min_size=1, max_size=4))
def test_readers_on_damaged_files(tmp_path, valid_reader_files, which, flips):
    """Flipped bytes: refused, or loaded with the original shape (a flipped byte inside the
    numbers of a format without checksums cannot be detected)."""
    arr, raw = valid_reader_files
    blob = bytearray(raw[which])
    for where, mask in flips:
        blob[int(where * len(blob))] ^= mask
    path = fresh(tmp_path, Path(which).suffix)
    path.write_bytes(bytes(blob))
    runs = load_or_clean_failure(path)
    if runs is not None and Path(which).suffix in (".npy", ".npz", ".h5"):
        assert [r.shape for r in runs] == [arr.shape]


_DESCRS = ("<f8", ">f4", "<i4", "|u1", "|b1", "<c16", "|O", "|V8", "<U3", "|S2", "<M8[s]",
           "<f2", "zz", "", "[('a', '<f8')]", "<f8 ", "f9")


@FUZZ
@given(descr=st.sampled_from(_DESCRS),
       shape=st.one_of(st.lists(st.integers(-3, 2 ** 62), max_size=4).map(tuple),
                       st.sampled_from(["(3,)", "(2, 'a')", "(1.5, 2)", "None", "(("])),
       fortran=st.sampled_from(["False", "True", "1", "'no'"]),
       raw=st.one_of(st.none(), st.text(max_size=80)),
       body=st.binary(max_size=200), version=st.sampled_from([1, 2, 3]))
def test_npy_header_fuzz(tmp_path, descr, shape, fortran, raw, body, version):
    """Any .npy header text: the header is parsed without running or loading anything."""
    text = raw if raw is not None else (f"{{'descr': {descr!r}, 'fortran_order': {fortran}, "
                                        f"'shape': {shape if isinstance(shape, str) else shape!r}}}")
    header = text.encode("latin1", "replace")
    header += b" " * (-(len(header) + 11) % 64) + b"\n"
    size = struct.pack("<H", len(header)) if version == 1 else struct.pack("<I", len(header))
    path = fresh(tmp_path, ".npy")
    path.write_bytes(b"\x93NUMPY" + bytes([version, 0]) + size + header + body)
    load_or_clean_failure(path)


def _npy_member(kind: str, seed: int) -> bytes:
    rng = np.random.default_rng(seed)
    if kind == "float2d":
        return array_bytes(rng.normal(size=(5, 2)))
    if kind == "int2d":
        return array_bytes(rng.integers(0, 9, size=(4, 2)))
    if kind == "float3col":
        return array_bytes(rng.normal(size=(3, 3)))
    if kind == "nan":
        return array_bytes(np.array([[1.0, np.nan]]))
    if kind == "object":
        return array_bytes(np.array([{"a": 1}, None], dtype=object))
    if kind == "names":
        return array_bytes(np.array(["p", "q"]))
    if kind == "numbers":
        return array_bytes(np.array([1.5, 2.5]))
    if kind == "flat":
        return array_bytes(np.arange(4.0))
    if kind == "empty":
        return array_bytes(np.empty((0, 2)))
    if kind == "strings2d":
        return array_bytes(np.array([["a", "b"]]))
    return bytes(rng.integers(0, 256, size=int(seed % 300), dtype=np.uint8))


_MEMBER_KINDS = ("float2d", "int2d", "float3col", "nan", "object", "names", "numbers", "flat", "empty",
                 "strings2d", "junk")


@FUZZ
@given(members=st.lists(st.tuples(st.sampled_from(["a.npy", "b.npy", "feature_names.npy", "c",
                                                   "notes.txt", "d/e.npy", "f.npy"]),
                                  st.sampled_from(_MEMBER_KINDS), st.integers(0, 10 ** 6)),
                        max_size=4, unique_by=lambda m: m[0]),
       method=st.sampled_from([zipfile.ZIP_STORED, zipfile.ZIP_DEFLATED]),
       encrypt=st.booleans())
def test_npz_member_fuzz(tmp_path, members, method, encrypt):
    """Any members, any contents, encrypted or not: numeric 2-D members load, nothing else does
    and nothing is unpickled."""
    path = fresh(tmp_path, ".npz")
    with zipfile.ZipFile(path, "w", method) as zf:
        for name, kind, seed in members:
            zf.writestr(name, _npy_member(kind, seed))
    if encrypt and members:
        raw = bytearray(path.read_bytes())
        for sig, flag_at in ((b"PK\x03\x04", 6), (b"PK\x01\x02", 8)):
            start = 0
            while (i := raw.find(sig, start)) >= 0:
                raw[i + flag_at] |= 1  # general-purpose flag bit 0: "encrypted"
                start = i + 4
        path.write_bytes(bytes(raw))
    runs = load_or_clean_failure(path)
    if runs is not None:
        assert not encrypt
        kinds = [k for _, k, _ in members]
        assert all(k in ("float2d", "int2d", "float3col", "names") or n.endswith(".txt") is False
                   for n, k, _ in members)
        assert len(runs) == sum(k in ("float2d", "int2d", "float3col") for k in kinds)


_GOOD_TOKENS = st.one_of(st.integers(-10 ** 6, 10 ** 6).map(str),
                         st.floats(allow_nan=False, allow_infinity=False, width=64).map(repr))
_BAD_TOKENS = st.sampled_from(["", "nan", "NaN", "inf", "-inf", "1e999", "abc", "1,5", "0x10", "--1",
                               "\x00", "\"", "'", "1 2", "\u00e9", "\ufffd", "TRUE", "#", "1;2", " "])


@FUZZ
@given(n_cols=st.integers(1, 4), header=st.booleans(), sep=st.sampled_from([",", "\t"]),
       rows=st.lists(st.lists(st.one_of(_GOOD_TOKENS, _GOOD_TOKENS, _GOOD_TOKENS, _BAD_TOKENS),
                              min_size=0, max_size=5), min_size=0, max_size=6),
       newline=st.sampled_from(["\n", "\r\n"]), encoding=st.sampled_from(["utf-8", "latin-1", "utf-16"]))
def test_text_token_fuzz(tmp_path, n_cols, header, sep, rows, newline, encoding):
    """Text of random tokens. Oracle (written here, not by the reader): the file is valid when
    every row has one finite number per column; then the run equals float() of each token."""
    names = [f"c{j}" for j in range(n_cols)]
    lines = ([sep.join(names)] if header else []) + [sep.join(r) for r in rows]
    text = newline.join(lines) + newline
    path = fresh(tmp_path, ".csv" if sep == "," else ".tsv")
    path.write_bytes(text.encode(encoding, "replace"))

    def number(tok):
        try:
            v = float(tok)
        except ValueError:
            return None
        return v if math.isfinite(v) and tok.strip() == tok and "_" not in tok else None

    rows = [sep.join(r).split(sep) for r in rows]  # the fields as written ("1,5" is two in a CSV)
    rows = [r for r in rows if r != [""]]  # empty lines are skipped (blank lines)
    width = n_cols if header else (len(rows[0]) if rows else 0)
    valid = (encoding != "utf-16" and rows and width >= 1
             and all(len(r) == width and all(number(t) is not None for t in r) for r in rows))
    runs = load_or_clean_failure(path)
    if valid:
        assert runs is not None, text
        assert np.array_equal(runs[0], np.array([[float(t) for t in r] for r in rows])), text
    elif runs is not None:
        # what loaded must be exactly the numbers written (no row padded, no column invented)
        # (without a header row, a first row that is not all numbers is read as the names)
        expected = [np.array([[number(t) for t in r] for r in kept], dtype=object)
                    for kept in ([rows] if header else [rows, rows[1:]])]
        assert any(runs[0].shape == e.shape and np.array_equal(runs[0], e.astype(float))
                   for e in expected), text


def test_text_ragged_rows_named_with_line(tmp_path):
    """A short or long row is named by the line it is on; the missing value is not read as NaN."""
    (tmp_path / "short.csv").write_text("a,b,c\n1,2,3\n\n4,5\n")
    with pytest.raises(InputError, match=r"short\.csv: line 4 has 2 values but .*3"):
        mk.load_trajectories(tmp_path / "short.csv")
    (tmp_path / "long.csv").write_text("1,2\n3,4,5\n")
    with pytest.raises(InputError, match=r"long\.csv: line 2 has 3 values but .*2"):
        mk.load_trajectories(tmp_path / "long.csv")


_H5_VALUES = st.sampled_from(["f2d", "i2d", "b2d", "c2d", "s2d", "f1d", "f3d", "empty", "compound",
                              "nan", "vlen", "scalar"])


def _h5_value(kind):
    if kind == "f2d":
        return np.arange(6.0).reshape(3, 2)
    if kind == "i2d":
        return np.arange(6).reshape(3, 2)
    if kind == "b2d":
        return np.ones((3, 2), bool)
    if kind == "c2d":
        return np.ones((3, 2), complex)
    if kind == "s2d":
        return np.array([[b"a", b"b"]])
    if kind == "f1d":
        return np.arange(3.0)
    if kind == "f3d":
        return np.zeros((2, 2, 2))
    if kind == "empty":
        return np.empty((0, 2))
    if kind == "compound":
        return np.zeros((3, 2), dtype=[("x", "<f8")])
    if kind == "nan":
        return np.array([[1.0, np.nan], [2.0, 3.0]])
    if kind == "scalar":
        return np.float64(3)
    return None


_H5_NAMES = st.one_of(st.none(), st.sampled_from([["p", "q"], ["p"], ["p", "p"], [1, 2], [b"p", b"q"],
                                                  [["p", "q"]], "pq", 7]))


@FUZZ
@given(datasets=st.lists(st.tuples(st.sampled_from(["run", "g/run", "other", "x"]), _H5_VALUES),
                         max_size=3, unique_by=lambda d: d[0].split("/")[-1]),
       file_names=_H5_NAMES, ds_names=_H5_NAMES,
       key=st.one_of(st.none(), st.sampled_from(["run", "g", "missing", "g/run"])))
def test_hdf5_layout_fuzz(tmp_path, datasets, file_names, ds_names, key):
    """Datasets of any dtype and shape, feature-name attributes of any kind, any key."""
    import h5py
    path = fresh(tmp_path, ".h5")
    with h5py.File(path, "w") as fh:
        for name, kind in datasets:
            value = _h5_value(kind)
            if kind == "vlen":
                ds = fh.create_dataset(name, (2, 2), dtype=h5py.vlen_dtype(np.float64))
            else:
                ds = fh.create_dataset(name, data=value)
            if ds_names is not None:
                ds.attrs["feature_names"] = ds_names
        if file_names is not None:
            fh.attrs["feature_names"] = file_names
    runs = load_or_clean_failure(path, key=key)
    if runs is not None:
        assert all(r.shape[1] == 2 for r in runs)


def test_feature_count_mismatch_names_both_files(tmp_path):
    """Run 1 with 3 columns, run 2 with 4: both files and both counts are named, whatever the
    formats (in-memory text runs carry no file name of their own)."""
    import pandas as pd
    a, b = np.zeros((5, 3)), np.ones((5, 4))
    pd.DataFrame(a).to_csv(tmp_path / "one.csv", index=False, header=False)
    pd.DataFrame(b).to_csv(tmp_path / "two.csv", index=False, header=False)
    np.save(tmp_path / "three.npy", b)
    np.savez(tmp_path / "both.npz", first=a, second=b)
    for files, first, second in (
            (["one.csv", "two.csv"], "one.csv", "two.csv"),
            (["one.csv", "three.npy"], "one.csv", "three.npy"),
            (["both.npz"], "both.npz: array 'first'", "'second'")):
        with pytest.raises(InputError) as exc:
            mk.load_trajectories([tmp_path / f for f in files])
        text = str(exc.value)
        assert f"{first} has 3" in text and f"{second} has 4" in text, text


def test_directory_named_like_a_file(tmp_path):
    for suffix in READER_SUFFIXES:
        (tmp_path / f"runs{suffix}").mkdir()
        with pytest.raises(InputError, match=rf"runs\{suffix}' is a folder"):
            mk.load_trajectories(tmp_path / f"runs{suffix}")
        with pytest.raises(InputError, match=rf"runs\{suffix}' is a folder"):
            mk.load_trajectories([tmp_path / f"runs{suffix}"])


def test_pickled_npy_and_npz_are_never_unpickled(tmp_path, monkeypatch):
    """Object arrays need pickle; reading one must fail before anything is unpickled."""
    import pickle

    def forbidden(*args, **kwargs):
        raise AssertionError("unpickling attempted")

    monkeypatch.setattr(pickle, "load", forbidden)
    monkeypatch.setattr(pickle, "loads", forbidden)
    np.save(tmp_path / "obj.npy", np.array([[{"a": 1}]], dtype=object), allow_pickle=True)
    np.savez(tmp_path / "obj.npz", run=np.array([[1, None]], dtype=object))
    for name in ("obj.npy", "obj.npz"):
        with pytest.raises(InputError, match=rf"{name}.*(object|pickle)"):
            mk.load_trajectories(tmp_path / name)


# ----------------------------------------------------------------------------- readers: MD files

MD_PAIRS = np.array([[0, 5], [1, 9]])


@pytest.fixture(scope="module")
def md_files(tmp_path_factory):
    md = pytest.importorskip("mdtraj")
    folder = tmp_path_factory.mktemp("md")
    top = md.Topology()
    chain = top.add_chain()
    for _ in range(3):
        res = top.add_residue("ALA", chain)
        atoms = [top.add_atom(n, md.element.get_by_symbol(n[0]), res) for n in ("N", "CA", "C", "O")]
        for x, y in zip(atoms, atoms[1:]):
            top.add_bond(x, y)
    spine = np.array([[k * 0.145, 0.02 * (k % 2), 0.0] for k in range(9)])
    base = np.concatenate([np.vstack([spine[3 * r:3 * r + 3], spine[3 * r + 2] + [0, 0.12, 0]])
                           for r in range(3)])
    xyz = base + 0.01 * np.random.default_rng(5).normal(size=(20, 12, 3))
    traj = md.Trajectory(xyz.astype(np.float32), top)
    traj.save_pdb(str(folder / "top.pdb"))
    raw, full = {}, {}
    for suffix in (".dcd", ".xtc", ".trr", ".pdb", ".gro"):
        traj.save(str(folder / f"t{suffix}"))
        raw[suffix] = (folder / f"t{suffix}").read_bytes()
        full[suffix] = np.asarray(mk.load_trajectories(folder / f"t{suffix}", topology=folder / "top.pdb",
                                                       atom_pairs=MD_PAIRS)[0])
    return _Quiet((folder / "top.pdb", raw, full))


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(suffix=st.sampled_from((".dcd", ".xtc", ".trr", ".pdb", ".gro")),
       mode=st.sampled_from(("cut", "flip", "random")), where=st.floats(0, 1, exclude_max=True),
       junk=st.binary(min_size=1, max_size=400))
def test_md_readers_on_damaged_files(tmp_path, md_files, suffix, mode, where, junk):
    """MD trajectories cut short, with flipped bytes, or random bytes: features of every frame
    read, or InputError naming the file. A file cut exactly between two frames is a valid
    shorter trajectory (the formats record no frame count); it must give the first frames."""
    topology, raw, full = md_files
    blob = bytearray(raw[suffix])
    at = int(where * len(blob))
    if mode == "cut":
        blob = blob[:at]
    elif mode == "flip":
        blob[at] ^= junk[0]
    else:
        blob = bytearray(junk)
    path = fresh(tmp_path, suffix)
    path.write_bytes(bytes(blob))
    runs = load_or_clean_failure(path, topology=topology, atom_pairs=MD_PAIRS)
    if runs is not None and mode == "cut":
        (run,) = runs
        assert run.shape[1] == full[suffix].shape[1] and len(run) <= len(full[suffix])
        assert np.array_equal(run, full[suffix][:len(run)]), f"{suffix} cut at byte {at}"



def test_dcd_header_damage_byte_by_byte(tmp_path, md_files):
    """Every byte of a DCD header (the 84-byte control record, the title record, the atom
    count record) flipped in turn: features of every frame, or InputError naming the file.
    A damaged title length once reached ``seek`` with a negative offset (OSError). With 12
    atoms a coordinate record (4 x 12 bytes) has the length of a unit-cell record, so a flipped
    4D flag reads as fewer, valid-looking frames: then the frame count of the header must
    be reported as contradicted."""
    topology, raw, full = md_files
    header = 4 + 84 + 4 + 4 + 80 * 2 + 4 + 12  # two title lines, as mdtraj writes them
    for at in range(header):
        for xor in (0x01, 0x80, 0xff):
            blob = bytearray(raw[".dcd"])
            blob[at] ^= xor
            path = fresh(tmp_path, ".dcd")
            path.write_bytes(bytes(blob))
            with warnings.catch_warnings(record=True) as seen:
                warnings.simplefilter("always")
                runs = load_or_clean_failure(path, topology=topology, atom_pairs=MD_PAIRS)
            if runs is not None and runs[0].shape != full[".dcd"].shape:
                assert any("claims 20 frames" in str(w.message) for w in seen), f"byte {at} ^ {xor:#x}"


# ----------------------------------------------------------------------------- readers: the command

@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(prefix=st.sampled_from(MAGICS), data=st.binary(max_size=600),
       suffix=st.sampled_from(READER_SUFFIXES))
def test_cli_build_on_malformed_files(tmp_path, capsys, prefix, data, suffix):
    """``msmkit build`` on a malformed file: exit 1, one line naming the file, no model file."""
    from msmkit.cli import main
    good = tmp_path / "good.npy"
    np.save(good, np.random.default_rng(1).normal(size=(300, 2)))
    path = fresh(tmp_path, suffix)
    path.write_bytes(prefix + data)
    out = fresh(tmp_path, ".npz")
    capsys.readouterr()
    code = main(["build", str(good), str(path), "--lag", "1", "--states", "3", "-o", str(out), "-q"])
    err = capsys.readouterr().err.strip()
    if code == 0:
        assert out.exists() and err == ""
        return
    assert code == 1 and not out.exists()
    assert len(err.splitlines()) == 1 and "unexpected" not in err and path.name in err, err
    assert not list(tmp_path.glob("*.tmp*"))


def test_cli_build_on_a_malformed_file_as_a_user_runs_it(tmp_path):
    (tmp_path / "bad.npy").write_bytes(b"\x93NUMPY\x01\x00\x20\x00{'descr': 'zz', 'fortran_order': F\n")
    done = subprocess.run([sys.executable, "-m", "msmkit.cli", "build", str(tmp_path / "bad.npy"), "--lag", "1",
                           "-o", str(tmp_path / "m.npz")], capture_output=True, text=True, cwd=ROOT)
    assert done.returncode == 1, done.stderr
    assert done.stderr.startswith("msmkit build: error:") and "bad.npy" in done.stderr
    assert "Traceback" not in done.stderr and not (tmp_path / "m.npz").exists()


def test_damaged_xtc_that_crashes_the_decoder_is_refused(tmp_path, md_files):
    """One flipped byte (byte 1033 XOR 7 of this 20-frame file, found by fuzzing) makes mdtraj's
    XTC decoder overrun a buffer: the interpreter dies with a segmentation fault in about 6 of
    10 runs (measured; it depends on the memory layout), else a RuntimeError comes back. The
    reader decodes XTC files in a child process first, so the caller gets InputError and
    lives on (run 10 times here, so that the crash is met with near certainty)."""
    topology, raw, _ = md_files
    blob = bytearray(raw[".xtc"])
    blob[1033] ^= 7
    path = tmp_path / "crash.xtc"
    path.write_bytes(bytes(blob))
    direct = subprocess.run([sys.executable, "-c", "import sys\nfrom mdtraj.formats import XTCTrajectoryFile\n"
                             "with XTCTrajectoryFile(sys.argv[1]) as fh:\n    fh.read()\n", str(path)],
                            capture_output=True)
    assert direct.returncode != 0  # the reference: an unprotected read fails (or dies on a signal)
    for _ in range(10):
        with pytest.raises(InputError, match=r"crash\.xtc is truncated or corrupt: (the XTC decoder crashed|"
                                             r"the compressed coordinates cannot be decoded)"):
            mk.load_trajectories(path, topology=topology, atom_pairs=MD_PAIRS)
