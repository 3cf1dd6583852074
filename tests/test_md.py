"""Reading real MD files: the files MDAnalysisTests ships, MDAnalysis as the independent reference.

Every comparison is frame by frame against MDAnalysis (the readers of MDAnalysis and
MDAnalysis.lib.distances), never against mdtraj, which msmkit uses to read the files.
"""
from __future__ import annotations

import gzip
import shutil
import warnings

import numpy as np
import pytest

pytest.importorskip("mdtraj")
mda = pytest.importorskip("MDAnalysis")
data = pytest.importorskip("MDAnalysisTests.datafiles")
from MDAnalysis.lib.distances import calc_bonds, calc_dihedrals  # noqa: E402

from msmkit.cli import main  # noqa: E402
from msmkit.errors import DiagnosticWarning, InputError  # noqa: E402
from msmkit.io import load_trajectories  # noqa: E402


def _universe(*files):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return mda.Universe(*files)


def _copy(src, tmp_path, name=None, keep=None, garble=None):
    """A copy of a shipped file: cut to ``keep`` of the bytes, or with ``garble`` = (offset,
    n) bytes replaced by seeded random bytes."""
    raw = bytearray(open(src, "rb").read())
    if keep is not None:
        raw = raw[:int(len(raw) * keep)]
    if garble is not None:
        at, n = garble
        raw[at:at + n] = np.random.default_rng(12).integers(0, 256, n, dtype=np.uint8).tobytes()
    out = tmp_path / (name or src.rsplit("/", 1)[-1])
    out.write_bytes(bytes(raw))
    return str(out)


def _quiet_load(*args, **kwargs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DiagnosticWarning)
        return load_trajectories(*args, **kwargs)


# ---------------------------------------------------------------------------------------------
# Defect 1: truncated or corrupt files
# ---------------------------------------------------------------------------------------------

def test_frame_counts_and_time_step_match_mdanalysis():
    """MDAnalysis (DCDReader/XTCReader/TRRReader .n_frames and .dt, ps) on the shipped files."""
    from msmkit.mdfeatures import index_frames

    for traj, top in ((data.DCD, data.PSF), (data.XTC, data.GRO), (data.TRR, data.GRO)):
        u = _universe(top, traj)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", DiagnosticWarning)
            index = index_frames(traj)
        assert index.n_frames == u.trajectory.n_frames
        assert index.n_atoms == u.atoms.n_atoms
        assert index.dt == pytest.approx(u.trajectory.dt, rel=1e-5)


def test_dcd_header_claiming_more_frames_warns():
    # adk_dims.dcd's header says 500 frames; the file (and MDAnalysis) hold 98
    u = _universe(data.PSF, data.DCD)
    with pytest.warns(DiagnosticWarning, match=f"claims 500 frames but the file holds "
                                               f"{u.trajectory.n_frames}"):
        trajs = load_trajectories(data.DCD, topology=data.PSF)
    assert trajs.n_frames.tolist() == [u.trajectory.n_frames]


@pytest.mark.parametrize("traj, top, how", [
    (data.DCD, data.PSF, "half"), (data.DCD, data.PSF, "garbled"),
    (data.TRR, data.GRO, "half"), (data.XTC, data.GRO, "half"), (data.TRR, data.GRO, "garbled"),
])
def test_truncated_or_garbled_binary_files_raise(tmp_path, traj, top, how):
    # "half": 55 % of the bytes, since adk_oplsaa.trr cut at exactly 50 % ends on a frame
    # boundary and is then a valid 5-frame file (TRR/XTC store no frame count)
    size = len(open(traj, "rb").read())
    bad = (_copy(traj, tmp_path, keep=0.55) if how == "half"
           else _copy(traj, tmp_path, garble=(size // 2, 4096)))
    with pytest.raises(InputError, match="truncated or corrupt") as err:
        _quiet_load(bad, topology=top)
    assert bad in str(err.value)


@pytest.mark.parametrize("src, top, name", [
    (data.PDB_small, None, "adk_open.pdb"), (data.GRO, None, "adk_oplsaa.gro"),
    (data.NCDF, data.PRMncdf, "bala.ncdf"),
])
def test_truncated_text_and_netcdf_files_say_truncated_or_corrupt(tmp_path, src, top, name):
    bad = _copy(src, tmp_path, name=name, keep=0.5)
    with pytest.raises(InputError, match="truncated or corrupt") as err:
        _quiet_load(bad, topology=top)
    assert "string index out of range" not in str(err.value)
    assert bad in str(err.value)


# ---------------------------------------------------------------------------------------------
# Torsions (kept) and defect 3: names, numbering, chain breaks, atom indices
# ---------------------------------------------------------------------------------------------

def _torsion_reference(u, trajs, kind):
    """sin/cos of every `kind` torsion feature recomputed by MDAnalysis
    (MDAnalysis.lib.distances.calc_dihedrals) from the feature's exported atom indices."""
    cols = [k for k, n in enumerate(trajs.feature_names) if n.startswith(f"sin({kind} ")]
    quads = np.array([trajs.feature_atoms[k] for k in cols])
    ref = []
    for ts in u.trajectory:
        p = [u.atoms.positions[quads[:, i]] for i in range(4)]
        ref.append(calc_dihedrals(*p, box=ts.dimensions))
    return cols, quads, np.array(ref)


def test_psf_dcd_torsions_names_and_atoms_match_mdanalysis():
    u = _universe(data.PSF, data.DCD)
    trajs = _quiet_load(data.DCD, topology=data.PSF, features="backbone-torsions")
    x = np.asarray(trajs[0])
    for kind, sel in (("phi", "phi_selection"), ("psi", "psi_selection")):
        cols, quads, ref = _torsion_reference(u, trajs, kind)
        assert np.allclose(x[:, cols], np.sin(ref), atol=2e-5)   # float32 coordinates
        assert np.allclose(x[:, [c + 1 for c in cols]], np.cos(ref), atol=2e-5)
        # names and atoms as MDAnalysis' own residue selections give them (segid:resname resid)
        expected = {}
        for res in u.residues:
            ag = getattr(res, sel)()
            if ag is not None:
                expected[f"sin({kind} {res.segid}:{res.resname}{res.resid})"] = tuple(ag.indices)
        got = {trajs.feature_names[c]: tuple(q) for c, q in zip(cols, quads)}
        assert got == expected
    assert "sin(phi 4AKE:HSD126)" in trajs.feature_names  # CHARMM name kept, not HIS


def test_amber_numbering_from_one_like_mdanalysis():
    u = _universe(data.PRMncdf, data.NCDF)
    trajs = _quiet_load(data.NCDF, topology=data.PRMncdf)
    cols, quads, ref = _torsion_reference(u, trajs, "phi")
    x = np.asarray(trajs[0])
    assert np.allclose(x[:, cols], np.sin(ref), atol=2e-5)
    for c, q in zip(cols, quads):  # MDAnalysis numbers Amber residues from 1
        res = u.atoms[int(q[1])].residue
        assert trajs.feature_names[c].endswith(f":{res.resname}{res.resid})")
    assert not any("0)" in n.split(":")[1][-3:] and n.split(":")[1][3:-1] == "0"
                   for n in trajs.feature_names)


def test_no_torsion_across_a_chain_break(tmp_path):
    # adk_open.pdb with residues 50-52 cut out: psi of 49 and phi of 53 would span the gap
    lines = open(data.PDB_small).read().splitlines(keepends=True)
    kept = [ln for ln in lines if not (ln.startswith(("ATOM", "HETATM"))
                                       and 50 <= int(ln[22:26]) <= 52)]
    gap = tmp_path / "adk_gap.pdb"
    gap.write_text("".join(kept))
    trajs = _quiet_load(gap)
    u = _universe(str(gap))
    # reference: C(i)-N(i+1) distances by MDAnalysis; a peptide bond is 1.33 A (common practice)
    prot = u.select_atoms("protein").residues
    c = np.array([r.atoms.select_atoms("name C").positions[0] for r in prot])
    n = np.array([r.atoms.select_atoms("name N").positions[0] for r in prot])
    bonded = calc_bonds(c[:-1], n[1:]) < 2.0
    assert (~bonded).sum() == 1
    n_phi = sum(nm.startswith("sin(phi ") for nm in trajs.feature_names)
    n_psi = sum(nm.startswith("sin(psi ") for nm in trajs.feature_names)
    assert n_phi == n_psi == bonded.sum()
    i = int(np.flatnonzero(~bonded)[0])
    before, after = prot[i], prot[i + 1]
    assert (before.resid, after.resid) == (49, 53)
    psi_names = [nm for nm in trajs.feature_names if nm.startswith("sin(psi ")]
    phi_names = [nm for nm in trajs.feature_names if nm.startswith("sin(phi ")]
    assert not any(nm.endswith(f":{before.resname}{before.resid})") for nm in psi_names)
    assert not any(nm.endswith(f":{after.resname}{after.resid})") for nm in phi_names)
    assert any(nm.endswith(f":{after.resname}{after.resid})") for nm in psi_names)


def test_homodimer_loads_with_one_label_per_chain(tmp_path):
    gro = tmp_path / "YiiP_lipids.gro"
    with gzip.open(data.GRO_MEMPROT) as src, open(gro, "wb") as dst:
        shutil.copyfileobj(src, dst)
    trajs = _quiet_load(str(gro))
    assert len(set(trajs.feature_names)) == trajs.n_features
    a = [n for n in trajs.feature_names if "(phi A:" in n]
    b = [n for n in trajs.feature_names if "(phi B:" in n]
    assert len(a) == len(b) > 200
    assert [n.replace("A:", "") for n in a] == [n.replace("B:", "") for n in b]
    # reference: MDAnalysis reads the same protein residues, numbering restarting once
    u = _universe(str(gro))
    resids = u.select_atoms("protein").residues.resids
    assert (np.diff(resids) < 0).sum() == 1
    assert len(a) + len(b) == 2 * (len(resids) - 2)  # sin, cos: all but each chain's first


# ---------------------------------------------------------------------------------------------
# Defect 2: distances under periodic boundaries
# ---------------------------------------------------------------------------------------------

def test_ca_distances_whole_and_minimum_image_match_mdanalysis():
    """GRO+XTC of solvated adenylate kinase: default 'whole' against MDAnalysis after
    AtomGroup.unwrap (bonds from the TPR) and calc_bonds without a box; 'minimum-image'
    against calc_bonds with the box; frame by frame."""
    with pytest.warns(DiagnosticWarning, match="half"):
        mi = load_trajectories(data.XTC, topology=data.GRO, features="ca-distances",
                               periodic="minimum-image")
    whole = _quiet_load(data.XTC, topology=data.GRO, features="ca-distances")
    assert whole.feature_names == mi.feature_names
    pairs = np.array(whole.feature_atoms)
    u = _universe(data.TPR, data.XTC)
    protein = u.select_atoms("protein")
    ref_whole, ref_mi = [], []
    for ts in u.trajectory:
        ref_mi.append(calc_bonds(u.atoms.positions[pairs[:, 0]], u.atoms.positions[pairs[:, 1]],
                                 box=ts.dimensions))
        protein.unwrap(compound="fragments")
        ref_whole.append(calc_bonds(u.atoms.positions[pairs[:, 0]],
                                    u.atoms.positions[pairs[:, 1]]))
    ref_whole = np.array(ref_whole) / 10  # Angstrom -> nm
    ref_mi = np.array(ref_mi) / 10
    assert np.allclose(np.asarray(whole[0]), ref_whole, atol=1e-4)
    assert np.allclose(np.asarray(mi[0]), ref_mi, atol=1e-4)
    # the two differ exactly where a distance passes half the box: minimum image is wrong there
    half = u.dimensions[:3].min() / 20
    assert (ref_whole > half).mean() > 0.01
    assert np.allclose(ref_whole[ref_whole < 0.9 * half], ref_mi[ref_whole < 0.9 * half], atol=1e-4)


def test_no_periodicity_matches_mdanalysis_without_box():
    trajs = _quiet_load(data.XTC, topology=data.GRO, features="distances",
                        selection="name CA and resid 1 to 30", periodic="none")
    pairs = np.array(trajs.feature_atoms)
    u = _universe(data.GRO, data.XTC)
    ref = np.array([calc_bonds(u.atoms.positions[pairs[:, 0]], u.atoms.positions[pairs[:, 1]])
                    for _ in u.trajectory]) / 10
    assert np.allclose(np.asarray(trajs[0]), ref, atol=1e-4)


# ---------------------------------------------------------------------------------------------
# Chunked reading, frame ranges, time step
# ---------------------------------------------------------------------------------------------

def test_chunks_frames_and_dt_match_mdanalysis():
    from msmkit.mdfeatures import MDFeatures, read_md_features

    u = _universe(data.PSF, data.DCD)
    spec = MDFeatures(kinds=("backbone-torsions",))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DiagnosticWarning)
        full, names, atoms, dt = read_md_features(data.DCD, spec, topology=data.PSF)
        small, _, _, _ = read_md_features(data.DCD, spec, topology=data.PSF,
                                          chunk_bytes=7 * 12 * u.atoms.n_atoms)  # 7 frames
        part, _, _, dt3 = read_md_features(data.DCD, spec, topology=data.PSF,
                                           frames=slice(5, 60, 3), chunk_bytes=4 * 12 * 3341)
    assert np.array_equal(full, small)
    quads = np.array(atoms[0::2][:5])
    ref = np.array([calc_dihedrals(*(u.atoms.positions[quads[:, i]] for i in range(4)))
                    for _ in u.trajectory[5:60:3]])
    assert part.shape[0] == len(range(5, 60, 3))
    assert np.allclose(part[:, 0:10:2], np.sin(ref), atol=2e-5)
    assert dt == pytest.approx(u.trajectory.dt, rel=1e-5)
    assert dt3 == pytest.approx(3 * u.trajectory.dt, rel=1e-5)
    trajs = _quiet_load(data.XTC, topology=data.GRO, frames=slice(0, None, 2))
    ux = _universe(data.GRO, data.XTC)
    assert (trajs.dt, trajs.unit) == (pytest.approx(2 * ux.trajectory.dt, rel=1e-5), "ps")


# ---------------------------------------------------------------------------------------------
# Defect 5: the command line
# ---------------------------------------------------------------------------------------------

@pytest.mark.parametrize("traj, top", [(data.DCD, data.PSF), (data.XTC, data.GRO)])
def test_cli_build_and_scan_with_topology(tmp_path, traj, top, capsys):
    common = [traj, "--topology", top, "--features", "backbone-torsions", "--states", "2",
              "--tica-dim", "2", "-q"]
    assert main(["build", *common, "--lag", "1", "-o", str(tmp_path / "m.npz")]) == 0
    assert main(["scan", *common, "--lags", "1,2", "--samples", "0",
                 "-o", str(tmp_path / "scan")]) == 0
    assert (tmp_path / "m.npz").exists() and (tmp_path / "scan" / "summary.txt").exists()


def test_cli_without_topology_names_the_option_not_python(tmp_path, capsys):
    assert main(["build", data.XTC, "--lag", "1", "-o", str(tmp_path / "m.npz"), "-q"]) == 1
    err = capsys.readouterr().err
    assert "topology" in err and "topology=" not in err


def test_cli_scan_and_build_use_the_same_tica_lag(tmp_path):
    import pandas as pd

    from msmkit.model import load_model

    common = [data.DCD, "--topology", data.PSF, "--states", "4", "--tica-dim", "2", "-q"]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DiagnosticWarning)
        assert main(["scan", *common, "--lags", "1,3", "--samples", "0",
                     "-o", str(tmp_path / "scan")]) == 0
        assert main(["build", *common, "--lag", "3", "-o", str(tmp_path / "m.npz")]) == 0
    table = pd.read_csv(tmp_path / "scan" / "implied_timescales.csv")
    scanned = table[table["lag"] == 3].sort_values("process")["timescale"].to_numpy()
    model = load_model(tmp_path / "m.npz")
    built = model.relaxation_times(model.n_states - 1)
    assert np.allclose(built, scanned[:len(built)], rtol=1e-6)


# ---------------------------------------------------------------------------------------------
# Defect 4: formats that were refused or misrouted
# ---------------------------------------------------------------------------------------------

def test_compressed_trajectory_and_topology_are_read():
    # tz2.truncoct.parm7.bz2 + tz2.truncoct.nc; YiiP_lipids.gro.gz (shipped compressed)
    u = _universe(data.PRM7, data.NCDFtruncoct)
    trajs = _quiet_load(data.NCDFtruncoct, topology=data.PRM7)
    cols, _, ref = _torsion_reference(u, trajs, "phi")
    assert np.allclose(np.asarray(trajs[0])[:, cols], np.sin(ref), atol=2e-5)
    dimer = _quiet_load(data.GRO_MEMPROT)
    assert dimer.sources == (data.GRO_MEMPROT,) and "sin(phi B:ASP8)" in dimer.feature_names


def test_charmm_crd_is_refused_with_advice():
    with pytest.raises(InputError, match="CHARMM coordinate"):
        load_trajectories(data.CRD)


def test_mdtraj_layout_hdf5_is_not_read_as_features(tmp_path):
    h5py = pytest.importorskip("h5py")
    u = _universe(data.PSF, data.DCD)
    path = tmp_path / "adk.h5"
    with h5py.File(path, "w") as fh:  # the layout mdtraj writes: nm, frames x atoms x 3
        fh["coordinates"] = np.array([u.atoms.positions / 10 for _ in u.trajectory[:3]])
        fh["cell_lengths"] = np.ones((3, 3), dtype=np.float32)
        fh["topology"] = np.bytes_("{}")
    try:
        trajs = _quiet_load(path)
    except ImportError as err:  # PyTables missing: said, not silently read as features
        assert "mdtraj HDF5 trajectory" in str(err)
    else:
        assert "cell_lengths" not in " ".join(trajs.feature_names)
    with pytest.raises((InputError, ImportError)):
        _quiet_load(path, topology=data.PSF)


# ---------------------------------------------------------------------------------------------
# Defect 7: TICA on more features than frames
# ---------------------------------------------------------------------------------------------

def test_tica_says_more_features_than_frames():
    from msmkit.reduce import TICA

    # adk_dims.dcd + adk_dims2.dcd: 852 torsion features, about 200 frames (MDAnalysis counts)
    n = sum(_universe(data.PSF, f).trajectory.n_frames for f in (data.DCD, data.DCD2))
    trajs = _quiet_load([data.DCD, data.DCD2], topology=data.PSF)
    assert trajs.total_frames == n < trajs.n_features
    with pytest.warns(DiagnosticWarning, match="more features than frames"):
        TICA(1, dim=2).fit(trajs)
    few = _quiet_load([data.DCD, data.DCD2], topology=data.PSF,
                      selection="resid 1 to 20")  # 76 features < frames
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        TICA(1, dim=2).fit(few)
    assert not any("more features than frames" in str(w.message) for w in caught)


# ---------------------------------------------------------------------------------------------
# Defect 6: features of different spreads clustered without TICA
# ---------------------------------------------------------------------------------------------

def _mixed(**kw):
    # torsion sines/cosines (sd below 1) next to CA-CA distances in nm: spreads differ a lot
    return _quiet_load(data.DCD, topology=data.PSF, features="backbone-torsions,ca-distances",
                       selection="resid 1 to 30", **kw)


def test_standardized_features_match_numpy():
    trajs = _mixed()
    x = np.asarray(trajs[0])
    sd = x.std(axis=0)  # numpy reference (population standard deviation)
    assert sd.max() > 10 * sd[sd > 0].min()
    scaled = trajs.standardized(chunk_size=7)
    assert np.allclose(scaled.feature_mean, x.mean(axis=0), atol=1e-12)
    assert np.allclose(scaled.feature_scale, np.where(sd > 0, sd, 1), rtol=1e-9)
    assert np.allclose(np.asarray(scaled[0]), (x - x.mean(axis=0)) / np.where(sd > 0, sd, 1),
                       atol=1e-9)


def test_cli_scales_features_without_tica_and_cautions_when_told_not_to(tmp_path, capsys):
    from msmkit.model import load_model

    common = [data.DCD, "--topology", data.PSF, "--features", "backbone-torsions,ca-distances",
              "--select", "resid 1 to 30", "--states", "3", "--lag", "1"]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DiagnosticWarning)
        assert main(["build", *common, "--scale", "none", "-o", str(tmp_path / "raw.npz")]) == 0
        said = capsys.readouterr().out
        assert "caution: the features are clustered unscaled" in said
        assert main(["build", *common, "-o", str(tmp_path / "std.npz")]) == 0
    assert "caution: the features are clustered unscaled" not in capsys.readouterr().out
    x = np.asarray(_mixed()[0])
    model = load_model(tmp_path / "std.npz")
    assert np.allclose(model.extras["feature_mean"], x.mean(axis=0), atol=1e-12)
    assert np.allclose(model.extras["feature_scale"], x.std(axis=0), rtol=1e-9)
    assert "feature_scale" not in load_model(tmp_path / "raw.npz").extras


# ---------------------------------------------------------------------------------------------
# A saved model assigns new trajectories
# ---------------------------------------------------------------------------------------------

def test_saved_model_assigns_files_as_it_was_built(tmp_path):
    from msmkit.io import assign_files
    from msmkit.model import fingerprint
    from msmkit.model import load_model

    out = tmp_path / "m.npz"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DiagnosticWarning)
        assert main(["build", data.DCD, "--topology", data.PSF, "--states", "4", "--tica-dim", "2",
                     "--lag", "3", "-q", "-o", str(out)]) == 0
        model = load_model(out)
        again = assign_files(model, data.DCD, topology=data.PSF)
        new = assign_files(model, data.DCD2, topology=data.PSF)
    # the training file comes back with the very labels the model was counted from
    assert fingerprint(again) == model.metadata["labels_sha256"]
    assert len(new[0]) == _universe(data.PSF, data.DCD2).trajectory.n_frames
    assert set(np.unique(new[0])) <= set(range(4))
    with pytest.raises(InputError, match="differ from those the model was built on"):
        assign_files(model, data.XTC, topology=data.GRO)


def test_sidechain_chi1_matches_mdanalysis():
    u = _universe(data.PSF, data.DCD)
    trajs = _quiet_load(data.DCD, topology=data.PSF, features="sidechain-torsions")
    cols, quads, ref = _torsion_reference(u, trajs, "chi1")
    assert np.allclose(np.asarray(trajs[0])[:, cols], np.sin(ref), atol=2e-5)
    # the residues and atoms as MDAnalysis' Residue.chi1_selection() picks them
    expected = {}
    for res in u.residues:
        ag = res.chi1_selection()
        if ag is not None:
            expected[f"sin(chi1 {res.segid}:{res.resname}{res.resid})"] = tuple(ag.indices)
    got = {trajs.feature_names[c]: tuple(q) for c, q in zip(cols, quads)}
    assert got == expected


def test_residue_minimum_distances_match_mdanalysis():
    """Closest heavy-atom distance of residue pairs at least 3 apart, default 'whole', against
    MDAnalysis: AtomGroup.unwrap, then MDAnalysis.lib.distances.distance_array minimum."""
    from MDAnalysis.lib.distances import distance_array

    trajs = _quiet_load(data.XTC, topology=data.GRO, features="residue-mindist",
                        selection="resSeq 1 to 12")
    u = _universe(data.TPR, data.XTC)
    protein = u.select_atoms("protein")
    res = [r.atoms.select_atoms("not name H*") for r in u.residues[:12]]
    pairs = [(i, j) for i in range(12) for j in range(i + 3, 12)]
    assert trajs.n_features == len(pairs)
    assert trajs.feature_names[0] == (f"mindist(A:{u.residues[0].resname}1, "
                                      f"A:{u.residues[3].resname}4)")
    ref = []
    for _ in u.trajectory:
        protein.unwrap(compound="fragments")
        ref.append([distance_array(res[i].positions, res[j].positions).min() for i, j in pairs])
    assert np.allclose(np.asarray(trajs[0]), np.array(ref) / 10, atol=1e-4)
    assert set(trajs.feature_atoms[0]) == set(res[0].indices) | set(res[3].indices)
