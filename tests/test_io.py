"""Tests for msmkit.io: file round trips, lazy runs, chunked reading and bad input."""
import importlib.util
import os
import sys

import numpy as np
import pandas as pd
import pytest

from msmkit.errors import InputError
from msmkit.io import LazyRun, TrajectorySet, iter_chunks, load_trajectories


@pytest.fixture
def rng():
    return np.random.default_rng(7)


@pytest.fixture
def data(rng):
    return rng.normal(size=(257, 3)) * 10 + 5


# --------------------------------------------------------------------------------------------
# Round trips: every format returns exactly the array that was written
# --------------------------------------------------------------------------------------------

@pytest.mark.parametrize("variant", ["c", "fortran", "float32", "bigendian", "int"])
def test_npy_round_trip_is_lazy_and_exact(tmp_path, data, variant):
    arr = {"c": data, "fortran": np.asfortranarray(data), "float32": data.astype(np.float32),
           "bigendian": data.astype(">f8"), "int": np.round(data).astype(np.int32)}[variant]
    path = tmp_path / "run.npy"
    np.save(path, arr)
    trajs = load_trajectories(str(path))
    run = trajs[0]
    assert isinstance(run, LazyRun)
    expected = arr.astype(np.float64) if variant == "int" else arr
    assert np.array_equal(np.asarray(run), expected)
    assert run.shape == arr.shape and len(run) == arr.shape[0]
    assert run.dtype == (np.float32 if variant == "float32" else np.float64)
    # no memory map is kept alive between reads (resident-memory growth when streaming)
    assert not any(isinstance(v, np.memmap) for v in vars(run).values())
    blocks = list(iter_chunks(run, 50))
    assert [len(b) for b in blocks] == [50] * 5 + [7]
    assert np.array_equal(np.concatenate(blocks), expected)


def test_lazy_run_indexing_matches_numpy(tmp_path, data):
    np.save(tmp_path / "a.npy", data)
    run = load_trajectories(tmp_path / "a.npy")[0]
    keys = [5, -1, slice(None), slice(3, 40), slice(3, 200, 7), slice(None, None, -3),
            slice(200, 10, -4), slice(-20, None), slice(300, 400), [4, 0, 4, 256, -2],
            slice(1, None, 100), slice(None, None, 10 ** 6), [],
            np.arange(257) % 3 == 0, (slice(10, 20), 1), (7, 2), (slice(None, None, 5), [0, 2])]
    for key in keys:
        assert np.array_equal(run[key], data[key]), key
    with pytest.raises(IndexError):
        run[257]


def test_iter_chunks_on_arrays_gives_views(data):
    blocks = list(iter_chunks(data, 100))
    assert [b.shape for b in blocks] == [(100, 3), (100, 3), (57, 3)]
    assert all(np.shares_memory(b, data) for b in blocks)


def test_npz_runs_and_feature_names(tmp_path, data):
    path = tmp_path / "runs.npz"
    np.savez(path, first=data, second=data[:10] * 2, feature_names=np.array(["a", "b", "c"]))
    trajs = load_trajectories(path)
    assert len(trajs) == 2 and trajs.feature_names == ("a", "b", "c")
    assert np.array_equal(trajs[0], data) and np.array_equal(trajs[1], data[:10] * 2)
    assert list(trajs.n_frames) == [257, 10] and trajs.total_frames == 267


@pytest.mark.parametrize("suffix,sep", [(".csv", ","), (".tsv", "\t")])
def test_text_round_trip_with_header(tmp_path, data, suffix, sep):
    path = tmp_path / f"run{suffix}"
    pd.DataFrame(data, columns=["phi", "psi", "dist"]).to_csv(path, sep=sep, index=False)
    trajs = load_trajectories(str(path))
    assert trajs.feature_names == ("phi", "psi", "dist")
    assert np.array_equal(trajs[0], data)  # pandas writes shortest round-trip repr


def test_csv_without_header_gets_default_names(tmp_path, data):
    path = tmp_path / "plain.csv"
    np.savetxt(path, data, delimiter=",", fmt="%.17g")
    trajs = load_trajectories(path)
    assert trajs.feature_names == ("x0", "x1", "x2")
    assert np.array_equal(trajs[0], data)


def test_hdf5_round_trip(tmp_path, data):
    h5py = pytest.importorskip("h5py")
    path = tmp_path / "runs.h5"
    with h5py.File(path, "w") as fh:
        fh.create_dataset("sim/run1", data=data)
        fh.create_dataset("sim/run0", data=data[::2], chunks=(16, 3))
        fh.create_dataset("time", data=np.arange(5.0))  # 1-D: not a run
        fh.attrs["feature_names"] = ["u", "v", "w"]
    trajs = load_trajectories(path)
    assert len(trajs) == 2 and trajs.feature_names == ("u", "v", "w")
    assert all(isinstance(r, LazyRun) for r in trajs)
    assert np.array_equal(trajs[0], data[::2]) and np.array_equal(trajs[1], data)  # sorted by path
    assert np.array_equal(np.concatenate(list(iter_chunks(trajs[1], 40))), data)
    one = load_trajectories(path, key="sim/run1")
    assert len(one) == 1 and np.array_equal(one[0], data)
    with pytest.raises(InputError, match="no dataset of that name"):
        load_trajectories(path, key="nope")


def test_glob_lists_and_arrays_mix(tmp_path, data):
    for i in range(3):
        np.save(tmp_path / f"r{i}.npy", data + i)
    trajs = load_trajectories(str(tmp_path / "r*.npy"), dt=0.5, unit="ns", progress=True)
    assert len(trajs) == 3 and trajs.dt == 0.5 and trajs.unit == "ns"
    assert [os.path.basename(s) for s in trajs.sources] == ["r0.npy", "r1.npy", "r2.npy"]
    for i, run in enumerate(trajs):
        assert np.array_equal(run, data + i)
    mixed = load_trajectories([tmp_path / "r1.npy", data * 2])
    assert np.array_equal(mixed[1], data * 2) and mixed.sources[1] is None
    assert isinstance(mixed[:1], TrajectorySet) and len(mixed[:1]) == 1
    assert load_trajectories(data).total_frames == 257
    frame = pd.DataFrame(data, columns=["p", "q", "r"])
    assert load_trajectories(frame).feature_names == ("p", "q", "r")


def test_in_memory_and_check_values(tmp_path, data):
    np.save(tmp_path / "a.npy", data)
    trajs = load_trajectories(tmp_path / "a.npy")
    mem = trajs.in_memory()
    assert isinstance(mem[0], np.ndarray) and np.array_equal(mem[0], data)
    assert trajs.check_values() is trajs


# --------------------------------------------------------------------------------------------
# Bad input: each raises InputError naming the file / argument
# --------------------------------------------------------------------------------------------

def test_missing_file_and_empty_glob(tmp_path):
    with pytest.raises(InputError, match="no such file"):
        load_trajectories(tmp_path / "absent.npy")
    with pytest.raises(InputError, match="matched no files"):
        load_trajectories(str(tmp_path / "*.npy"))
    with pytest.raises(InputError, match="is a folder"):
        load_trajectories(tmp_path)
    with pytest.raises(InputError, match="empty list"):
        load_trajectories([])


@pytest.mark.parametrize("suffix", [".xlsx", ".txt", ".xvg", ".dat"])
def test_unknown_type(tmp_path, suffix):
    path = tmp_path / f"run{suffix}"
    path.write_bytes(b"# a text table\n1 2\n\x00\xff binary junk")
    with pytest.raises(InputError, match=rf"run\{suffix}: unknown file type '\{suffix}'; supported: .npy"):
        load_trajectories(path)


def test_empty_unreadable_and_truncated_files(tmp_path, data):
    (tmp_path / "empty.npy").write_bytes(b"")
    with pytest.raises(InputError, match=r"empty\.npy is empty"):
        load_trajectories(tmp_path / "empty.npy")
    (tmp_path / "junk.npy").write_bytes(b"this is not numpy data")
    with pytest.raises(InputError, match=r"junk\.npy is not a readable \.npy"):
        load_trajectories(tmp_path / "junk.npy")
    (tmp_path / "junk.npz").write_bytes(b"PK not a zip")
    with pytest.raises(InputError, match=r"junk\.npz is not a readable \.npz"):
        load_trajectories(tmp_path / "junk.npz")
    np.save(tmp_path / "cut.npy", data)
    raw = (tmp_path / "cut.npy").read_bytes()
    (tmp_path / "cut.npy").write_bytes(raw[:-100])
    with pytest.raises(InputError, match=r"cut\.npy is truncated"):
        load_trajectories(tmp_path / "cut.npy")
    np.save(tmp_path / "noframes.npy", np.empty((0, 3)))
    with pytest.raises(InputError, match="holds no frames"):
        load_trajectories(tmp_path / "noframes.npy")
    (tmp_path / "header.csv").write_text("a,b\n")
    with pytest.raises(InputError, match="header but no frames"):
        load_trajectories(tmp_path / "header.csv")


def test_wrong_shapes_and_types(tmp_path):
    np.save(tmp_path / "flat.npy", np.arange(10.0))
    with pytest.raises(InputError, match=r"must be 2-D .*x\[:, None\]"):
        load_trajectories(tmp_path / "flat.npy")
    np.save(tmp_path / "xyz.npy", np.zeros((4, 5, 3)))
    with pytest.raises(InputError, match="must be 2-D.*compute features"):
        load_trajectories(tmp_path / "xyz.npy")
    np.save(tmp_path / "text.npy", np.array([["a", "b"]]))
    with pytest.raises(InputError, match="must be real numbers"):
        load_trajectories(tmp_path / "text.npy")
    (tmp_path / "words.csv").write_text("a,b\n1,2\n3,oops\n")
    with pytest.raises(InputError, match=r"frame 1 \(line 3\) has 'oops' in column 1 \('b'\)"):
        load_trajectories(tmp_path / "words.csv")
    with pytest.raises(InputError, match=r"source must be a 2-D array .* shape \(5,\)"):
        load_trajectories(np.zeros(5))
    with pytest.raises(InputError, match="but got None"):
        load_trajectories(None)


def test_runs_with_different_features(tmp_path, data):
    np.save(tmp_path / "a.npy", data)
    np.save(tmp_path / "b.npy", data[:, :2])
    with pytest.raises(InputError, match=r"same number of features.*a\.npy has 3.*b\.npy has 2"):
        load_trajectories([tmp_path / "a.npy", tmp_path / "b.npy"])
    with pytest.raises(InputError, match="same number of features"):
        load_trajectories([data, data[:, :2]])
    pd.DataFrame(data, columns=["a", "b", "c"]).to_csv(tmp_path / "x.csv", index=False)
    pd.DataFrame(data, columns=["a", "b", "z"]).to_csv(tmp_path / "y.csv", index=False)
    with pytest.raises(InputError, match="feature names differ"):
        load_trajectories([tmp_path / "x.csv", tmp_path / "y.csv"])
    with pytest.raises(InputError, match="feature_names has 2 names"):
        load_trajectories(data, feature_names=["a", "b"])
    with pytest.raises(InputError, match="unique"):
        load_trajectories(data, feature_names=["a", "b", "a"])


def test_nan_in_small_files_found_at_load(tmp_path, data):
    bad = data.copy()
    bad[42, 1] = np.nan
    pd.DataFrame(bad, columns=["a", "b", "c"]).to_csv(tmp_path / "bad.csv", index=False)
    with pytest.raises(InputError, match=r"bad\.csv: frame 42 \(line 44\) has nan in feature 1 \('b'\)"):
        load_trajectories(tmp_path / "bad.csv")
    np.savez(tmp_path / "bad.npz", run=bad)
    with pytest.raises(InputError, match=r"bad\.npz:run: frame 42 has nan"):
        load_trajectories(tmp_path / "bad.npz")
    with pytest.raises(InputError, match="frame 42 has nan"):
        load_trajectories([data, bad])


def test_nan_in_lazy_file_found_while_reading(tmp_path, data):
    bad = data.copy()
    bad[200, 2] = np.inf
    np.save(tmp_path / "bad.npy", bad)
    trajs = load_trajectories(tmp_path / "bad.npy")  # lazy: not read yet
    first = next(iter_chunks(trajs[0], 100))  # frames 0..99 are fine
    assert first.shape == (100, 3)
    with pytest.raises(InputError, match=r"bad\.npy: frame 200 has inf in feature 2"):
        list(iter_chunks(trajs[0], 100))
    with pytest.raises(InputError, match="frame 200"):
        trajs.check_values()
    with pytest.raises(InputError, match="frame 200"):
        np.asarray(trajs[0])


def test_missing_optional_packages_name_the_extra(tmp_path, monkeypatch):
    (tmp_path / "runs.h5").write_bytes(b"x")
    (tmp_path / "traj.xtc").write_bytes(b"x")
    monkeypatch.setitem(sys.modules, "h5py", None)
    monkeypatch.setitem(sys.modules, "mdtraj", None)
    with pytest.raises(ImportError, match=r"pip install 'msmkit\[hdf5\]'"):
        load_trajectories(tmp_path / "runs.h5")
    with pytest.raises(ImportError, match=r"pip install 'msmkit\[md\]'"):
        load_trajectories(tmp_path / "traj.xtc")


# --------------------------------------------------------------------------------------------
# MD formats (only where mdtraj is installed)
# --------------------------------------------------------------------------------------------

def _dihedral(p0, p1, p2, p3):
    """Dihedral angle by the IUPAC convention, atan2 form:
    phi = atan2(((b1 x b2) x (b2 x b3)) . b2/|b2|, (b1 x b2) . (b2 x b3)), b_i = p_i - p_(i-1)
    (Blondel & Karplus, J. Comput. Chem. 17, 1132 (1996), from memory; common practice)."""
    b1, b2, b3 = p1 - p0, p2 - p1, p3 - p2
    n1, n2 = np.cross(b1, b2), np.cross(b2, b3)
    y = (np.cross(n1, n2) * b2).sum(-1) / np.linalg.norm(b2, axis=-1)
    return np.arctan2(y, (n1 * n2).sum(-1))


@pytest.mark.skipif(importlib.util.find_spec("mdtraj") is None, reason="mdtraj not installed")
def test_md_features_from_pdb_and_dcd(tmp_path, rng):
    import mdtraj as md

    top = md.Topology()
    chain = top.add_chain()
    for _ in range(3):
        res = top.add_residue("ALA", chain)
        atoms = [top.add_atom(name, md.element.get_by_symbol(name[0]), res)
                 for name in ("N", "CA", "C", "O")]
        top.add_bond(atoms[0], atoms[1])
        top.add_bond(atoms[1], atoms[2])
        top.add_bond(atoms[2], atoms[3])
    for a, b in zip(list(top.atoms)[2::4], list(top.atoms)[4::4]):
        top.add_bond(a, b)
    # backbone N, CA, C every 0.145 nm along a zigzag (so the C-N peptide bond stays under the
    # 0.2 nm chain-break limit), each O 0.12 nm off its C
    spine = np.array([[k * 0.145, 0.02 * (k % 2), 0.0] for k in range(9)])
    base = np.concatenate([np.vstack([spine[3 * r:3 * r + 3], spine[3 * r + 2] + [0, 0.12, 0]])
                           for r in range(3)])
    xyz = base + 0.02 * rng.normal(size=(25, 12, 3))
    traj = md.Trajectory(xyz.astype(np.float32), top)
    traj.save_pdb(str(tmp_path / "pep.pdb"))
    traj.save_dcd(str(tmp_path / "pep.dcd"))
    pairs = np.array([[1, 9], [0, 11]])
    got = load_trajectories(tmp_path / "pep.dcd", topology=tmp_path / "pep.pdb", atom_pairs=pairs)
    phi_idx, phi = md.compute_phi(traj)
    psi_idx, psi = md.compute_psi(traj)
    assert got.n_features == 2 * (phi.shape[1] + psi.shape[1]) + 2
    assert got.feature_names[0].startswith("sin(phi")
    x = np.asarray(got[0])
    xyz32 = traj.xyz.astype(np.float64)
    own_phi = _dihedral(*(xyz32[:, phi_idx[0, k]] for k in range(4)))
    assert np.allclose(x[:, 0], np.sin(own_phi), atol=1e-4)
    assert np.allclose(x[:, 1], np.cos(own_phi), atol=1e-4)
    dist = np.linalg.norm(xyz32[:, 1] - xyz32[:, 9], axis=-1)
    assert np.allclose(x[:, -2], dist, atol=1e-4)
    with pytest.raises(InputError, match="topology is required"):
        load_trajectories(tmp_path / "pep.dcd")
    from_pdb = load_trajectories(tmp_path / "pep.pdb", atom_pairs=pairs)
    # PDB stores coordinates to 0.001 Angstrom, which moves torsions of this tiny,
    # noisy chain by up to ~1e-2
    assert np.allclose(np.asarray(from_pdb[0]), x, atol=2e-2)


# --------------------------------------------------------------------------------------------
# Malformed files: InputError naming the file (and the line), never a silently changed run
# --------------------------------------------------------------------------------------------

def test_text_header_shorter_than_the_rows_is_refused(tmp_path):
    # pandas alone would take the first column as an index and drop it (common practice:
    # pandas.read_csv infers index_col when the header has one name fewer)
    (tmp_path / "short_header.csv").write_text("a,b\n1,2,3\n4,5,6\n")
    with pytest.raises(InputError, match=r"short_header\.csv: line 2 has 3 values but the header has 2"):
        load_trajectories(tmp_path / "short_header.csv")


def test_text_line_numbers_count_blank_lines_and_crlf(tmp_path):
    (tmp_path / "gaps.csv").write_bytes(b"\xef\xbb\xbfa,b\r\n\r\n1,2\r\n\r\n3,x\r\n")
    with pytest.raises(InputError, match=r"gaps\.csv: frame 1 \(line 5\) has 'x' in column 1 \('b'\)"):
        load_trajectories(tmp_path / "gaps.csv")
    (tmp_path / "ok.csv").write_bytes(b"\xef\xbb\xbfa,b\r\n\r\n1,2\r\n\r\n3,4\r\n")
    trajs = load_trajectories(tmp_path / "ok.csv")
    assert trajs.feature_names == ("a", "b") and np.array_equal(trajs[0], [[1, 2], [3, 4]])


def test_text_quoted_names_with_separators_load(tmp_path, data):
    names = ["d(1,2)", "d(3,4)", "angle"]
    pd.DataFrame(data, columns=names).to_csv(tmp_path / "q.csv", index=False)
    trajs = load_trajectories(tmp_path / "q.csv")
    assert trajs.feature_names == tuple(names) and np.allclose(trajs[0], data)


def test_text_not_utf8_and_duplicate_names(tmp_path):
    (tmp_path / "latin.csv").write_bytes("a,b\n1,2\n3,\u00e9\n".encode("latin-1"))
    with pytest.raises(InputError, match=r"latin\.csv: line 3 is not UTF-8 text \(byte 0xe9\)"):
        load_trajectories(tmp_path / "latin.csv")
    (tmp_path / "twice.csv").write_text("a,a\n1,2\n")
    with pytest.raises(InputError, match=r"twice\.csv: the header names the column 'a' twice"):
        load_trajectories(tmp_path / "twice.csv")


def test_npy_longer_than_its_header_declares(tmp_path, data):
    np.save(tmp_path / "long.npy", data)
    with open(tmp_path / "long.npy", "ab") as fh:
        fh.write(b"\0" * 24)
    with pytest.raises(InputError, match=r"long\.npy is damaged \(longer than the header declares\)"):
        load_trajectories(tmp_path / "long.npy")


def test_npz_members_that_are_not_plain_arrays(tmp_path, data):
    import zipfile
    with zipfile.ZipFile(tmp_path / "extra.npz", "w") as zf:
        zf.writestr("run.npy", _npy(data))
        zf.writestr("README.txt", b"notes")
    with pytest.raises(InputError, match=r"extra\.npz holds \['README\.txt'\], which is not a numpy array"):
        load_trajectories(tmp_path / "extra.npz")
    with zipfile.ZipFile(tmp_path / "lzma.npz", "w", zipfile.ZIP_LZMA) as zf:
        zf.writestr("run.npy", _npy(data))
    with pytest.raises(InputError, match=r"lzma\.npz:run uses zip compression method 14"):
        load_trajectories(tmp_path / "lzma.npz")
    np.savez(tmp_path / "names.npz", run=data, feature_names=np.array([1.0, 2.0, 3.0]))
    with pytest.raises(InputError, match=r"names\.npz:feature_names must be a flat array of strings"):
        load_trajectories(tmp_path / "names.npz")
    np.savez(tmp_path / "mixed.npz", a=data, b=data[:, :2])
    with pytest.raises(InputError, match=r"mixed\.npz: array 'a' has 3 features but 'b' has 2"):
        load_trajectories(tmp_path / "mixed.npz")


def _npy(arr) -> bytes:
    import io
    buf = io.BytesIO()
    np.save(buf, arr)
    return buf.getvalue()


def test_encrypted_npz_member(tmp_path, data):
    import zipfile
    with zipfile.ZipFile(tmp_path / "locked.npz", "w") as zf:
        zf.writestr("run.npy", _npy(data))
    raw = bytearray((tmp_path / "locked.npz").read_bytes())
    for sig, at in ((b"PK\x03\x04", 6), (b"PK\x01\x02", 8)):  # general-purpose flag bit 0 (zip APPNOTE 4.4.4)
        raw[raw.find(sig) + at] |= 1
    (tmp_path / "locked.npz").write_bytes(bytes(raw))
    with pytest.raises(InputError, match=r"locked\.npz:run is encrypted"):
        load_trajectories(tmp_path / "locked.npz")


def test_stored_feature_names_are_checked_per_file(tmp_path, data):
    h5py = pytest.importorskip("h5py")
    with h5py.File(tmp_path / "runs.h5", "w") as fh:
        fh.create_dataset("run", data=data).attrs["feature_names"] = ["a", "b"]
    with pytest.raises(InputError, match=r"feature_names has 2 names but .*runs\.h5 \(feature names stored "
                                         r"in the file\) has 3 features"):
        load_trajectories(tmp_path / "runs.h5")
    trajs = load_trajectories(tmp_path / "runs.h5", feature_names=["x", "y", "z"])  # the override wins
    assert trajs.feature_names == ("x", "y", "z")


def test_text_carriage_return_inside_a_line(tmp_path):
    # pandas would split the line at the lone CR, so every later line number would be off
    (tmp_path / "cr.csv").write_bytes(b"1,2\r\n3,4\r5,6\n")
    with pytest.raises(InputError, match=r"cr\.csv: line 2 holds a carriage return"):
        load_trajectories(tmp_path / "cr.csv")


def test_text_words_true_false_are_not_numbers(tmp_path):
    # pandas reads a column of True/False as booleans, which would become 1.0/0.0
    (tmp_path / "flags.csv").write_text("a,b\nTrue,1\nFalse,2\n")
    with pytest.raises(InputError, match=r"flags\.csv: frame 0 \(line 2\) has 'True' in column 0 \('a'\)"):
        load_trajectories(tmp_path / "flags.csv")
