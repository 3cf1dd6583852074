"""The session file: what goes in comes out (exact array equality, checked with numpy), foreign
or damaged files are refused with InputError, and a failed write leaves nothing behind.

References: numpy's own ``.npz`` reader (``numpy.load(allow_pickle=False)``) for what the file
holds; exact equality of the arrays written and read (``numpy.array_equal``)."""
import json
import os
import zipfile

import numpy as np
import pytest

import msmkit as mk
from msmkit import demo
from msmkit.errors import InputError
from msmkit.session import Session, load_session, save_session, session_arrays


@pytest.fixture(scope="module")
def session():
    trajs = demo.trajectories(seed=2, n_runs=5, min_frames=600, max_frames=900)
    tica = mk.TICA(5, dim=2).fit(trajs)
    micro = mk.Microstates(12, seed=0).fit(list(tica.transform(trajs)))
    with pytest.warns(mk.DiagnosticWarning):
        scan = mk.lag_scan(micro.labels_, [1, 2, 5], dt=demo.DT, unit=demo.UNIT, n_samples=4, seed=0)
    model = scan.model(2)
    ck = mk.chapman_kolmogorov(model, micro.labels_, n_sets=2, multiples=2, n_samples=4, seed=0)
    macro = model.find_macrostates(2, labels=micro.labels_, n_samples=4, seed=0)
    return Session(settings={"fields": {"lags": {"lags": "1, 2, 5", "reversible": True}}, "note": [1, 2.5, None]},
                   dt=demo.DT, unit=demo.UNIT, frames_per_run=[len(r) for r in trajs], trajectories_sha256="ab",
                   microstates=micro, tica=tica, feature_scaling=(np.arange(3.0), np.ones(3)), scan=scan, lag=2,
                   ck=ck, flow_pair=(1, 0), macrostates=macro, pair=(1, 0))


@pytest.fixture
def saved(session, tmp_path):
    return save_session(session, tmp_path / "analysis.npz")


def test_round_trip_keeps_every_stored_array(session, saved):
    again = load_session(saved)
    before, after = session_arrays(session), session_arrays(again)
    assert sorted(before) == sorted(after)
    for key in before:
        if key == "session":
            continue
        a, b = before[key], after[key]
        assert a.dtype == b.dtype and a.shape == b.shape, key
        assert np.array_equal(a, b, equal_nan=a.dtype.kind == "f"), key
    first, second = json.loads(str(before["session"])), json.loads(str(after["session"]))
    first.pop("created"), second.pop("created")
    assert first == second
    # what the tables and plots are drawn from, read back as the objects they were
    np.testing.assert_array_equal(again.scan.timescales, session.scan.timescales)
    np.testing.assert_array_equal(again.scan.samples, session.scan.samples)
    assert again.scan.suggested_lag == session.scan.suggested_lag and again.scan.reason == session.scan.reason
    assert again.scan.notes == session.scan.notes
    assert sorted(again.scan.models) == [1, 2, 5]
    np.testing.assert_array_equal(again.model.propagator, session.model.propagator)
    assert (again.model.transition_counts != session.model.transition_counts).nnz == 0
    assert again.ck.verdict == session.ck.verdict and again.ck.criterion == session.ck.criterion
    np.testing.assert_array_equal(again.ck.deviation, session.ck.deviation)
    assert all(np.array_equal(a, b) for a, b in zip(again.ck.members, session.ck.members))
    np.testing.assert_array_equal(again.macrostates.affinity, session.macrostates.affinity)
    np.testing.assert_array_equal(again.macrostates.samples.propagators, session.macrostates.samples.propagators)
    np.testing.assert_array_equal(again.macrostates.samples.equilibria, session.macrostates.samples.equilibria)
    assert again.macrostates.samples.uncertainty == session.macrostates.samples.uncertainty
    assert again.macrostates.populations().equals(session.macrostates.populations())
    np.testing.assert_array_equal(again.tica.cumulative_kinetic_variance_, session.tica.cumulative_kinetic_variance_)
    x = np.asarray(demo.trajectories(seed=2, n_runs=1, min_frames=600, max_frames=900)[0])
    np.testing.assert_array_equal(again.tica.transform(x), session.tica.transform(x))
    assert all(np.array_equal(a, b) for a, b in zip(again.labels, session.labels))
    assert again.pair == (1, 0) and again.flow_pair == (1, 0) and again.lag == 2
    assert again.settings == session.settings


def test_the_file_is_plain_arrays_without_pickles(saved):
    with np.load(saved, allow_pickle=False) as data:  # raises on any object array
        assert str(data["format"]) == "msmkit-session"
        for key in data.files:
            assert data[key].dtype.kind in "biufU", key


def test_refuses_to_overwrite_without_permission(session, saved):
    before = saved.read_bytes()
    with pytest.raises(InputError, match="exists"):
        save_session(session, saved)
    assert saved.read_bytes() == before
    assert save_session(session, saved, overwrite=True) == saved


def test_npz_suffix_is_added(session, tmp_path):
    written = save_session(session, tmp_path / "plain")
    assert written.name == "plain.npz" and written.is_file()


def test_a_failed_write_leaves_no_file(session, tmp_path, monkeypatch):
    import msmkit.session as module

    def half(fh, arrays):
        fh.write(b"PK\x03\x04 half an archive")
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(module, "write_arrays", half)
    with pytest.raises(OSError):
        save_session(session, tmp_path / "full.npz")
    assert list(tmp_path.iterdir()) == []  # no file, no temporary left
    # a good file already there stays whole when replacing it fails
    monkeypatch.undo()
    good = save_session(session, tmp_path / "keep.npz")
    content = good.read_bytes()
    monkeypatch.setattr(module, "write_arrays", half)
    with pytest.raises(OSError):
        save_session(session, good, overwrite=True)
    assert good.read_bytes() == content and sorted(p.name for p in tmp_path.iterdir()) == ["keep.npz"]
    monkeypatch.undo()
    assert load_session(good).lag == 2


def rewritten(path, out, change):
    """A copy of the archive at ``path`` with ``change(dict of arrays)`` applied (numpy's writer)."""
    with np.load(path, allow_pickle=False) as data:
        arrays = {k: data[k] for k in data.files}
    change(arrays)
    np.savez(out, **arrays)
    return out


def test_damaged_and_foreign_files_are_refused(session, saved, tmp_path):
    raw = saved.read_bytes()
    cases = {}
    (tmp_path / "cut.npz").write_bytes(raw[: len(raw) // 2])
    cases["cut.npz"] = "not a readable session file"
    flipped = bytearray(raw)  # one byte inside the compressed data of the timescales
    info = zipfile.ZipFile(saved).getinfo("scan.timescales.npy")
    start = info.header_offset + 30 + int.from_bytes(raw[info.header_offset + 26:info.header_offset + 28], "little") \
        + int.from_bytes(raw[info.header_offset + 28:info.header_offset + 30], "little")  # zip local header layout
    flipped[start + info.compress_size // 2] ^= 0xFF
    (tmp_path / "flipped.npz").write_bytes(bytes(flipped))
    cases["flipped.npz"] = "session file"
    (tmp_path / "text.npz").write_text("hello")
    cases["text.npz"] = "not a readable session file"
    session.model.save(tmp_path / "model.npz")
    cases["model.npz"] = "model file, not a session file"
    np.savez(tmp_path / "other.npz", x=np.arange(3))
    cases["other.npz"] = "not an msmkit session file"
    rewritten(saved, tmp_path / "missing.npz", lambda a: a.pop("scan.timescales"))
    cases["missing.npz"] = "does not hold"
    rewritten(saved, tmp_path / "shape.npz", lambda a: a.update({"scan.timescales": a["scan.timescales"][:, :1]}))
    cases["shape.npz"] = "do not fit together"
    rewritten(saved, tmp_path / "model_bad.npz",
              lambda a: a.update({"scan.models.2.propagator": a["scan.models.2.propagator"] * 2}))
    cases["model_bad.npz"] = "rows do not sum to 1"
    rewritten(saved, tmp_path / "tica.npz", lambda a: a.update({"tica.components_": a["tica.components_"][:1]}))
    cases["tica.npz"] = "TICA components"
    rewritten(saved, tmp_path / "labels.npz",
              lambda a: a.update({"microstates.labels_.0": a["microstates.labels_.0"] + 100}))
    cases["labels.npz"] = "must name the 12 microstates"
    rewritten(saved, tmp_path / "json.npz", lambda a: a.update({"session": np.array("{not json")}))
    cases["json.npz"] = "not a readable session file"
    rewritten(saved, tmp_path / "version.npz", lambda a: a.update({"format_version": np.array(99)}))
    cases["version.npz"] = "not supported"
    with zipfile.ZipFile(tmp_path / "pickled.npz", "w") as zf:  # an object array, as numpy would pickle it
        import io
        buf = io.BytesIO()
        np.lib.format.write_array(buf, np.array([{"a": 1}], dtype=object), allow_pickle=True)
        zf.writestr("format.npy", buf.getvalue())
    cases["pickled.npz"] = "pickled"
    for name, words in cases.items():
        with pytest.raises(InputError, match=words):
            load_session(tmp_path / name)
    with pytest.raises(InputError, match="not a file"):
        load_session(tmp_path / "nowhere.npz")
    with pytest.raises(InputError, match="path"):
        load_session(3)


def test_a_test_of_another_model_is_refused(session, tmp_path):
    import dataclasses

    wrong = dataclasses.replace(session, lag=5)  # the test was made at lag 2
    path = save_session(wrong, tmp_path / "wrong.npz")
    with pytest.raises(InputError, match="belong to the model at the chosen lag"):
        load_session(path)


def test_bad_values_to_save(session, tmp_path):
    with pytest.raises(InputError, match="Session"):
        save_session({"lag": 2}, tmp_path / "x.npz")
    import dataclasses
    with pytest.raises(InputError, match="cannot store"):
        save_session(dataclasses.replace(session, settings={"f": object()}), tmp_path / "x.npz")
    with pytest.raises(InputError, match="does not exist"):
        save_session(session, tmp_path / "no" / "x.npz")
    assert not os.path.exists(tmp_path / "x.npz")

