"""Features of molecular-dynamics trajectories, computed while reading coordinates in chunks.

:class:`MDFeatures` says which features to compute (backbone or side-chain torsions, CA-CA
distances, distances/contacts between selected atoms) and how to treat periodic boundaries.
:func:`read_md_features` reads one trajectory file in bounded chunks of frames (only the atoms
the features need), checks the file's structure first (truncated or corrupt binary files raise
:class:`~msmkit.errors.InputError` naming the file) and returns frames x features.

Names follow the topology: ``"sin(phi 4AKE:HSD126)"`` is the sine of the phi torsion of
residue HSD 126 of segment/chain 4AKE, with the residue name and number as the topology file
writes them (CHARMM HSD/HSE kept, Amber residues numbered from 1 as Amber tools do). Files
without chain identifiers get chains A, B, ... wherever the protein's residue numbering starts
again (a homodimer written as one chain). Torsions never span a chain break (a C-N peptide
bond longer than 0.2 nm in the first frame). Every feature carries the atom indices (0-based,
in the topology's order) it is computed from.

mdtraj reads the files; it is an optional extra (``msmkit[md]``).
"""
from __future__ import annotations

import contextlib
import os
import shutil
import struct
import tempfile
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ._checks import require_optional
from .errors import DiagnosticWarning, InputError

__all__ = ["MDFeatures", "FEATURE_KINDS", "PERIODIC_MODES", "FileIndex", "index_frames",
           "read_md_features"]

FEATURE_KINDS = ("backbone-torsions", "sidechain-torsions", "ca-distances", "residue-mindist",
                 "distances", "inverse-distances", "contacts")
PERIODIC_MODES = ("whole", "minimum-image", "none")
_TOPOLOGY_IN_FILE = (".pdb", ".gro", ".lh5", ".arc", ".h5")
_AMBER_TOPOLOGY = (".prmtop", ".parm7")
_PEPTIDE_BREAK_NM = 0.2       # a C-N peptide bond is 0.133 nm; longer means a chain break
_AKMA_PS = 0.0488882129       # CHARMM time unit (AKMA) in ps (common practice)
_HALF_BOX_WARN = 0.45         # warn when a minimum-image distance passes 45 % of the box width
_CHUNK_BYTES = 32 * 2 ** 20   # coordinates decoded per chunk
_TORSION_ATOMS = {  # atoms of each backbone torsion, as (residue offset, atom name)
    "phi": ((-1, "C"), (0, "N"), (0, "CA"), (0, "C")),
    "psi": ((0, "N"), (0, "CA"), (0, "C"), (1, "N")),
    "omega": ((0, "CA"), (0, "C"), (1, "N"), (1, "CA")),
}


# ---------------------------------------------------------------------------------------------
# The feature specification
# ---------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class MDFeatures:
    """Which features to compute from coordinates, and in which way.

    Parameters
    ----------
    kinds : sequence of str
        Any of ``"backbone-torsions"`` (phi, psi), ``"sidechain-torsions"`` (chi1, chi2),
        ``"ca-distances"`` (CA pairs at least 3 residues apart, nm), ``"residue-mindist"``
        (closest heavy atoms of residue pairs at least 3 apart, nm), ``"distances"`` (every
        pair of the selected atoms, nm), ``"inverse-distances"`` (1/distance, 1/nm) and
        ``"contacts"`` (1 where a pair of selected atoms is closer than ``cutoff``, else 0).
        Torsions are given as their sine and cosine.
    selection : str, optional
        mdtraj selection (e.g. ``"name CA and resSeq 10 to 50"``; in this language ``resSeq``
        is the file's residue number and ``resid`` a 0-based count) limiting every kind to those
        atoms; required for ``distances``, ``inverse-distances`` and ``contacts``.
    periodic : {"whole", "minimum-image", "none"}
        Distances in a periodic box: ``"whole"`` (default) joins every molecule across the
        boundaries along the bonds first, measures pairs inside one molecule directly and
        pairs between molecules by the minimum image; ``"minimum-image"`` folds every pair
        back to the nearest image (wrong beyond half the box); ``"none"`` ignores the box.
    cutoff : float
        Contact distance in nm for ``contacts`` (default 0.45 nm).
    torsions : sequence of str, optional
        Explicit torsions ("phi", "psi", "omega", "chi1".."chi4") in place of the kinds'.
    atom_pairs : (n, 2) int array, optional
        Explicit atom index pairs whose distances become features.
    """

    kinds: tuple = ("backbone-torsions",)
    selection: str | None = None
    periodic: str = "whole"
    cutoff: float = 0.45
    torsions: tuple | None = None
    atom_pairs: object = field(default=None, compare=False)

    def __post_init__(self):
        kinds = (self.kinds,) if isinstance(self.kinds, str) else tuple(self.kinds or ())
        kinds = tuple(k.strip() for part in kinds for k in str(part).split(",") if k.strip())
        for k in kinds:
            if k not in FEATURE_KINDS:
                raise InputError(f"features: unknown feature kind {k!r}; choose from "
                                 f"{', '.join(FEATURE_KINDS)}")
        object.__setattr__(self, "kinds", kinds)
        if self.periodic not in PERIODIC_MODES:
            raise InputError(f"periodic must be one of {', '.join(PERIODIC_MODES)}, but got "
                             f"{self.periodic!r}")
        if not (np.isfinite(self.cutoff) and self.cutoff > 0):
            raise InputError(f"cutoff must be a positive distance in nm, but got {self.cutoff!r}")
        if self.selection is None and {"distances", "inverse-distances", "contacts"} & set(kinds):
            raise InputError("features: distances, inverse-distances and contacts need an atom "
                             "selection (selection, e.g. 'name CA and resSeq 10 to 40')")
        if self.torsions is not None:
            tors = (self.torsions,) if isinstance(self.torsions, str) else tuple(self.torsions)
            for t in tors:
                if t not in _TORSION_ATOMS and t not in ("chi1", "chi2", "chi3", "chi4"):
                    raise InputError(f"torsions: unknown torsion {t!r}; choose from phi, psi, "
                                     f"omega, chi1, chi2, chi3, chi4")
            object.__setattr__(self, "torsions", tors)
        if not kinds and not self.torsions and self.atom_pairs is None:
            raise InputError("features: nothing to compute; give feature kinds, torsions or "
                             "atom pairs")

    def to_dict(self) -> dict:
        """A JSON-friendly description, stored in model files (see :func:`msmkit.io.assign_files`)."""
        pairs = None if self.atom_pairs is None else np.asarray(self.atom_pairs).tolist()
        return {"kinds": list(self.kinds), "selection": self.selection,
                "periodic": self.periodic, "cutoff": float(self.cutoff),
                "torsions": None if self.torsions is None else list(self.torsions),
                "atom_pairs": pairs}

    @classmethod
    def from_options(cls, features=None, torsions=("phi", "psi"), atom_pairs=None,
                     periodic="whole", selection=None) -> "MDFeatures":
        """The spec for the reader options of :func:`msmkit.load_trajectories`: feature kinds
        (``features``), or explicit ``torsions``/``atom_pairs`` when no kinds are given."""
        if isinstance(features, cls):
            return features
        if features is None:
            return cls(kinds=(), torsions=() if torsions is None else torsions,
                       atom_pairs=atom_pairs, periodic=periodic, selection=selection)
        return cls(kinds=features, atom_pairs=atom_pairs, periodic=periodic, selection=selection)

    @classmethod
    def from_dict(cls, spec: dict) -> "MDFeatures":
        try:
            pairs = spec.get("atom_pairs")
            return cls(kinds=tuple(spec.get("kinds", ())), selection=spec.get("selection"),
                       periodic=spec.get("periodic", "whole"), cutoff=spec.get("cutoff", 0.45),
                       torsions=spec.get("torsions"),
                       atom_pairs=None if pairs is None else np.asarray(pairs, dtype=np.int64))
        except (AttributeError, TypeError) as err:
            raise InputError(f"the stored feature description is malformed ({err})") from None

    def torsion_list(self) -> tuple:
        if self.torsions is not None:
            return self.torsions
        out = ()
        if "backbone-torsions" in self.kinds:
            out += ("phi", "psi")
        if "sidechain-torsions" in self.kinds:
            out += ("chi1", "chi2")
        return out


@dataclass
class _Plan:
    """Features laid out on one topology: names, atoms and how to compute them."""

    names: list
    atoms: list                       # per feature, a tuple of global atom indices
    quads: np.ndarray                 # (n_torsions, 4) global atom indices
    pairs: np.ndarray                 # (n_pairs, 2)
    pair_transform: list              # per block: (slice of pairs, "d"|"1/d"|"contact"|"mindist", group starts)
    same_molecule: np.ndarray         # (n_pairs,) bool: both atoms in one bonded molecule
    read_atoms: np.ndarray            # sorted atom indices to read from the file
    unwrap: bool                      # make molecules whole before distances


# ---------------------------------------------------------------------------------------------
# Labels that follow the topology file
# ---------------------------------------------------------------------------------------------

def _raw_residue_names(path: str, n_atoms: int):
    """Residue name per atom as written in a PSF/PDB/GRO file (mdtraj renames HSD to HIS)."""
    suffix = Path(path).suffix.lower()
    names = []
    try:
        with open(path, errors="replace") as fh:
            if suffix == ".psf":
                for line in fh:
                    if "!NATOM" in line:
                        count = int(line.split()[0])
                        for _ in range(count):
                            names.append(fh.readline().split()[3])
                        break
            elif suffix == ".pdb":
                for line in fh:
                    if line.startswith(("ATOM", "HETATM")):
                        names.append(line[17:21].strip())
                    elif line.startswith("ENDMDL"):
                        break
            elif suffix == ".gro":
                fh.readline()
                count = int(fh.readline().split()[0])
                names = [fh.readline()[5:10].strip() for _ in range(count)]
            else:
                return None
    except (OSError, ValueError, IndexError):
        return None
    return names if len(names) == n_atoms else None


def _residue_labels(top, topology_path: str | None):
    """``(chain label, residue name, residue number)`` per residue of an mdtraj topology."""
    raw = _raw_residue_names(topology_path, top.n_atoms) if topology_path else None
    amber = bool(topology_path) and Path(topology_path).suffix.lower() in _AMBER_TOPOLOGY
    labels = []
    letters = iter("ABCDEFGHIJKLMNOPQRSTUVWXYZ")
    named = any(getattr(c, "chain_id", None) for c in top.chains) or any(
        r.segment_id for r in top.residues)
    for chain in top.chains:
        label = getattr(chain, "chain_id", None) or None
        previous = None
        for res in chain.residues:
            number = res.index + 1 if amber else res.resSeq
            if res.segment_id:
                label = res.segment_id
            elif not named and (label is None or (res.is_protein and previous is not None
                                                  and number <= previous)):
                label = next(letters, f"chain{chain.index}-{res.index}")
            if res.is_protein:
                previous = number
            name = raw[res.atom(0).index] if raw else res.name
            labels.append((str(label), name, int(number)))
    return labels


def _residue_text(labels, res) -> str:
    chain, name, number = labels[res.index]
    return f"{chain}:{name}{number}"


# ---------------------------------------------------------------------------------------------
# Laying the features out on a topology
# ---------------------------------------------------------------------------------------------

def _bonded_break(xyz0, box0, a, b) -> bool:
    d = xyz0[b] - xyz0[a]
    # minimum image: a peptide bond is far shorter than half a box; a flat or non-finite box
    # (a damaged frame: its features fail the finite check later) gives no image shift
    if box0 is not None and np.isfinite(box0).all() and abs(np.linalg.det(box0)) > 1e-12:
        d = d - box0.T @ np.round(np.linalg.solve(box0.T, d))
    return float(np.linalg.norm(d)) > _PEPTIDE_BREAK_NM


def _backbone_quads(top, labels, kind, xyz0, box0, allowed):
    """Quadruplets of a backbone torsion within one chain, skipping chain breaks."""
    residues = [r for r in top.residues if r.is_protein]
    atoms = [{a.name: a.index for a in r.atoms} for r in residues]
    quads, owners = [], []
    for i, res in enumerate(residues):
        quad = []
        for off, name in _TORSION_ATOMS[kind]:
            j = i + off
            if not 0 <= j < len(residues) or labels[residues[j].index][0] != labels[res.index][0] \
                    or name not in atoms[j]:
                break
            quad.append(atoms[j][name])
        if len(quad) != 4 or not allowed[quad].all():
            continue
        other = i - 1 if kind == "phi" else i  # the peptide bond the torsion crosses
        if _bonded_break(xyz0, box0, atoms[other]["C"], atoms[other + 1]["N"]):
            continue
        quads.append(quad)
        owners.append(res)
    return quads, owners


def _sidechain_quads(md, traj0, kind, allowed):
    indices, _ = getattr(md, f"compute_{kind}")(traj0)
    top = traj0.topology
    keep = [q for q in indices if allowed[q].all()]
    return [list(map(int, q)) for q in keep], [top.atom(int(q[1])).residue for q in keep]


def _plan(md, traj0, spec: MDFeatures, topology_path) -> _Plan:
    top = traj0.topology
    labels = _residue_labels(top, topology_path)
    allowed = np.ones(top.n_atoms, dtype=bool)
    if spec.selection is not None:
        try:
            chosen = top.select(spec.selection)
        except Exception as err:  # mdtraj raises several types for a bad selection
            raise InputError(f"selection {spec.selection!r} is not a valid mdtraj selection "
                             f"({err})") from None
        if not len(chosen):
            raise InputError(f"selection {spec.selection!r} matches no atom of the topology")
        allowed[:] = False
        allowed[chosen] = True
    xyz0 = traj0.xyz[0].astype(np.float64)
    box0 = None if traj0.unitcell_vectors is None else traj0.unitcell_vectors[0].astype(np.float64)
    names, atoms, quads = [], [], []
    for kind in spec.torsion_list():
        if kind in _TORSION_ATOMS:
            qs, owners = _backbone_quads(top, labels, kind, xyz0, box0, allowed)
        else:
            qs, owners = _sidechain_quads(md, traj0, kind, allowed)
        for q, res in zip(qs, owners):
            label = f"{kind} {_residue_text(labels, res)}"
            names += [f"sin({label})", f"cos({label})"]
            atoms += [tuple(q), tuple(q)]
            quads.append(q)

    pairs, transform = [], []

    def add_pairs(block, word):
        start = len(pairs)
        for a, b in block:
            ra, rb = top.atom(int(a)), top.atom(int(b))
            ta = f"{_residue_text(labels, ra.residue)}-{ra.name}"
            tb = f"{_residue_text(labels, rb.residue)}-{rb.name}"
            names.append(f"{word}({ta}, {tb})")
            atoms.append((int(a), int(b)))
            pairs.append((int(a), int(b)))
        transform.append((slice(start, len(pairs)), word, None))

    if "residue-mindist" in spec.kinds:
        # heavy atoms of each protein residue with selected atoms; pairs of residues at least
        # 3 apart along the sequence (common practice), closest heavy-atom distance
        heavy = {}
        for res in top.residues:
            ids = [a.index for a in res.atoms if allowed[a.index] and res.is_protein
                   and (a.element is None or a.element.symbol != "H")]
            if ids:
                heavy[res.index] = ids
        keys = sorted(heavy)
        start, starts = len(pairs), []
        for x, rx in enumerate(keys):
            for ry in keys[x + 1:]:
                if ry - rx < 3:
                    continue
                starts.append(len(pairs) - start)
                pairs.extend((a, b) for a in heavy[rx] for b in heavy[ry])
                names.append(f"mindist({_residue_text(labels, top.residue(rx))}, "
                             f"{_residue_text(labels, top.residue(ry))})")
                atoms.append(tuple(heavy[rx] + heavy[ry]))
        if starts:
            transform.append((slice(start, len(pairs)), "mindist", np.array(starts)))

    if "ca-distances" in spec.kinds:
        ca = [a.index for a in top.atoms if a.name == "CA" and a.residue.is_protein
              and allowed[a.index]]
        res_of = np.array([top.atom(i).residue.index for i in ca])
        i, j = np.triu_indices(len(ca), 1)
        keep = np.abs(res_of[i] - res_of[j]) >= 3
        add_pairs(np.column_stack([np.array(ca)[i[keep]], np.array(ca)[j[keep]]]), "d")
    chosen = np.flatnonzero(allowed)
    if {"distances", "inverse-distances", "contacts"} & set(spec.kinds):
        i, j = np.triu_indices(len(chosen), 1)
        block = np.column_stack([chosen[i], chosen[j]])
        for kind, word in (("distances", "d"), ("inverse-distances", "1/d"),
                           ("contacts", "contact")):
            if kind in spec.kinds:
                add_pairs(block, word)
    if spec.atom_pairs is not None:
        explicit = np.asarray(spec.atom_pairs)
        if explicit.ndim != 2 or explicit.shape[1] != 2 or explicit.dtype.kind not in "iu":
            raise InputError(f"atom_pairs must be an (n, 2) array of atom indices, but got an "
                             f"array of shape {explicit.shape} and dtype {explicit.dtype}")
        if explicit.size and (explicit.min() < 0 or explicit.max() >= top.n_atoms):
            raise InputError(f"atom_pairs holds atom indices outside 0..{top.n_atoms - 1} "
                             f"(the topology has {top.n_atoms} atoms)")
        add_pairs(explicit, "d")
    if not names:
        raise InputError(f"the topology has no atoms for the features {', '.join(spec.kinds)}"
                         f"{' in selection ' + repr(spec.selection) if spec.selection else ''} "
                         f"(no protein backbone?); choose other features or a selection")
    if len(set(names)) != len(names):
        dup = next(n for n in names if names.count(n) > 1)
        raise InputError(f"two features would both be called {dup!r}: the topology repeats "
                         f"a chain label and residue number; label every chain differently")

    pairs_arr = np.asarray(pairs, dtype=np.int64).reshape(-1, 2)
    quads_arr = np.asarray(quads, dtype=np.int64).reshape(-1, 4)
    unwrap = spec.periodic == "whole" and box0 is not None and len(pairs_arr) > 0
    needed = set(pairs_arr.ravel().tolist()) | set(quads_arr.ravel().tolist())
    same = np.zeros(len(pairs_arr), dtype=bool)
    if unwrap:
        molecule = np.full(top.n_atoms, -1)
        for m, mol in enumerate(top.find_molecules()):
            members = [a.index for a in mol]
            molecule[members] = m
            if needed & set(members) and len(members) > 1:
                needed |= set(members)  # the whole molecule is needed to join it up
        same = (molecule[pairs_arr[:, 0]] == molecule[pairs_arr[:, 1]]) & (
            molecule[pairs_arr[:, 0]] >= 0)
        if top.n_bonds == 0:
            warnings.warn("periodic='whole': the topology has no bonds, so molecules cannot be "
                          "joined across the box; every distance is measured by the minimum "
                          "image", DiagnosticWarning, stacklevel=4)
            unwrap = False
    return _Plan(names, atoms, quads_arr, pairs_arr, transform, same,
                 np.array(sorted(needed), dtype=np.int64), unwrap)


def _box_widths(vectors: np.ndarray) -> np.ndarray:
    """Perpendicular widths (nm) of triclinic boxes, shape (n_frames, 3)."""
    a, b, c = vectors[:, 0], vectors[:, 1], vectors[:, 2]
    volume = np.abs(np.einsum("ij,ij->i", a, np.cross(b, c)))
    return np.stack([volume / np.linalg.norm(np.cross(b, c), axis=1),
                     volume / np.linalg.norm(np.cross(c, a), axis=1),
                     volume / np.linalg.norm(np.cross(a, b), axis=1)], axis=1)


def _compute(md, chunk, plan: _Plan, spec: MDFeatures, local, path, warned: set) -> np.ndarray:
    """Features of one chunk of frames; ``local`` maps global atom indices to chunk columns."""
    cols = []
    if len(plan.quads):
        angles = md.compute_dihedrals(chunk, local[plan.quads], periodic=True)
        sc = np.empty((angles.shape[0], 2 * angles.shape[1]))
        sc[:, 0::2] = np.sin(angles)
        sc[:, 1::2] = np.cos(angles)
        cols.append(sc)
    if len(plan.pairs):
        pairs = local[plan.pairs]
        has_box = chunk.unitcell_vectors is not None
        if spec.periodic == "none" or not has_box:
            dist = md.compute_distances(chunk, pairs, periodic=False)
            folded = np.zeros(len(pairs), dtype=bool)
        else:
            dist = md.compute_distances(chunk, pairs, periodic=True)
            folded = np.ones(len(pairs), dtype=bool)
            if plan.unwrap and plan.same_molecule.any():
                whole = chunk.make_molecules_whole(inplace=False)
                inside = plan.same_molecule
                dist[:, inside] = md.compute_distances(whole, pairs[inside], periodic=False)
                folded = ~inside
        dist = dist.astype(np.float64)
        if has_box and folded.any() and "half-box" not in warned:
            limit = _HALF_BOX_WARN * _box_widths(chunk.unitcell_vectors).min(axis=1)
            near = (dist[:, folded] > limit[:, None]).any(axis=0)
            if near.any():
                warned.add("half-box")
                a, b = plan.pairs[int(np.flatnonzero(folded)[near][0])]
                warnings.warn(f"{path}: {int(near.sum())} atom distances measured by the "
                              f"minimum image come within {100 * (1 - _HALF_BOX_WARN):.0f} % of "
                              f"half the box (e.g. atoms {a} and {b}); beyond half the box they fold back and "
                              f"are wrong. Use periodic='whole' for pairs in one molecule, or "
                              f"a larger box", DiagnosticWarning, stacklevel=5)
        for where, word, starts in plan.pair_transform:
            block = dist[:, where]
            if word == "mindist":
                block = np.minimum.reduceat(block, starts, axis=1)
            elif word == "1/d":
                block = 1.0 / block
            elif word == "contact":
                block = (block < spec.cutoff).astype(np.float64)
            cols.append(block)
    return np.hstack(cols)


# ---------------------------------------------------------------------------------------------
# Checking binary files before reading them
# ---------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class FileIndex:
    """What a file's own structure says: frames, atoms and time between frames (ps)."""

    n_frames: int
    n_atoms: int
    dt: float | None


def _corrupt(path, what) -> InputError:
    return InputError(f"{path} is truncated or corrupt: {what}; regenerate or re-copy the file "
                      f"(or cut it at the last good frame with your MD tools)")


def _index_dcd(path: str) -> FileIndex:
    size = os.path.getsize(path)
    with open(path, "rb") as fh:
        head = fh.read(4 + 84 + 4)
        if len(head) < 92:
            raise _corrupt(path, "the header is incomplete")
        endian = "<" if struct.unpack("<i", head[:4])[0] == 84 else ">"
        if struct.unpack(endian + "i", head[:4])[0] != 84 or head[4:8] != b"CORD":
            raise _corrupt(path, "it does not start with a DCD header")
        icntrl = struct.unpack(endian + "20i", head[8:88])
        nset, nsavc, n_fixed, charmm = icntrl[0], icntrl[2], icntrl[8], icntrl[19]
        delta = struct.unpack(endian + "f", head[44:48])[0] if charmm else \
            struct.unpack(endian + "d", head[44:52])[0]
        has_cell, four_d = (bool(icntrl[10]), bool(icntrl[11])) if charmm else (False, False)
        # the title record: its length (4 + 80 per line), the line count, the lines, the length
        title = fh.read(4)
        (n_title_bytes,) = struct.unpack(endian + "i", title) if len(title) == 4 else (-1,)
        if n_title_bytes < 4 or (n_title_bytes - 4) % 80 or 92 + n_title_bytes + 20 > size:
            raise _corrupt(path, "the title record of the header is broken")
        fh.seek(n_title_bytes, 1)
        marker = fh.read(16)
        closing, opening, n_atoms, ending = struct.unpack(endian + "4i", marker)
        if closing != n_title_bytes or opening != 4 or ending != 4 or n_atoms <= 0:
            raise _corrupt(path, "the header is incomplete or the atom count record is broken")
        header = fh.tell()
    if n_fixed:
        raise InputError(f"{path}: DCD files with fixed atoms are not supported; write all atoms")
    block = 4 * n_atoms + 8
    frame = (56 if has_cell else 0) + block * (4 if four_d else 3)
    n_frames, rest = divmod(size - header, frame)
    if rest:
        raise _corrupt(path, f"{size - header} bytes of frames is not a whole number of "
                             f"{frame}-byte frames ({n_frames} whole frames, {rest} bytes over; "
                             f"the header promises {nset})")
    offsets = [0, 52] if has_cell else []
    base = 56 if has_cell else 0
    for k in range(4 if four_d else 3):
        offsets += [base + k * block, base + k * block + block - 4]
    want = [48, 48] if has_cell else []
    want += [4 * n_atoms] * (len(offsets) - len(want))
    positions = header + np.arange(n_frames)[:, None] * frame + np.array(offsets)[None, :]
    mm = np.memmap(path, dtype=np.uint8, mode="r")
    try:
        raw = mm[(positions[..., None] + np.arange(4)).ravel()].copy()
    finally:
        del mm
    found = raw.view(endian + "i4").reshape(positions.shape)
    bad = np.flatnonzero((found != np.array(want)[None, :]).any(axis=1))
    if bad.size:
        raise _corrupt(path, f"frame {int(bad[0])} of {n_frames} has broken record markers "
                             f"({bad.size} frames damaged)")
    if nset != n_frames:
        warnings.warn(f"{path}: the DCD header claims {nset} frames but the file holds "
                      f"{n_frames}; reading the {n_frames} frames present", DiagnosticWarning,
                      stacklevel=4)
    dt = delta * nsavc * _AKMA_PS if delta > 0 and nsavc > 0 else None
    return FileIndex(n_frames, n_atoms, dt)


def _walk_xdr(path: str, parse_frame) -> tuple[int, int, list]:
    """Walk the frames of an XDR file (XTC, TRR): ``parse_frame(fh)`` returns
    ``(n_atoms, time, frame bytes)`` or raises; every frame must end inside the file."""
    size = os.path.getsize(path)
    n_frames, n_atoms, times, pos = 0, None, [], 0
    with open(path, "rb") as fh:
        while pos < size:
            fh.seek(pos)
            try:
                natoms, time, length = parse_frame(fh)
            except (struct.error, ValueError) as err:
                raise _corrupt(path, f"frame {n_frames} (byte {pos}) is unreadable ({err}); "
                                     f"{n_frames} whole frames precede it") from None
            if n_atoms is not None and natoms != n_atoms:
                raise _corrupt(path, f"frame {n_frames} has {natoms} atoms but frame 0 has "
                                     f"{n_atoms}")
            if pos + length > size:
                raise _corrupt(path, f"frame {n_frames} (byte {pos}) runs past the end of the "
                                     f"file; {n_frames} whole frames precede it")
            n_atoms = natoms
            times.append(time)
            pos += length
            n_frames += 1
    if not n_frames:
        raise _corrupt(path, "it holds no frame")
    return n_frames, n_atoms, times


def _xtc_frame(fh):
    head = fh.read(52 + 40)  # frame header, then the coordinate block's own header
    magic, natoms, _step, time = struct.unpack(">iiif", head[:16])
    if magic != 1995:
        raise ValueError(f"bad frame marker {magic}")
    if struct.unpack(">i", head[52:56])[0] != natoms:
        raise ValueError("the atom counts of the frame disagree")
    if natoms <= 9:
        return natoms, time, 56 + 12 * natoms
    nbytes = struct.unpack(">i", head[88:92])[0]
    if nbytes < 0:
        raise ValueError("negative compressed size")
    return natoms, time, 92 + 4 * ((nbytes + 3) // 4)


def _trr_frame(fh):
    head = fh.read(24 + 52)
    magic, _slen, strlen = struct.unpack(">iii", head[:12])
    if magic != 1993 or strlen != 12:
        raise ValueError(f"bad frame marker {magic}")
    sizes = struct.unpack(">13i", head[24:76])
    ir, e, box, vir, pres, top_, sym, x, v, f, natoms = sizes[:11]
    if min(sizes) < 0:
        raise ValueError("negative block size")
    double = (box == 72) or (natoms and x == 24 * natoms) or (natoms and v == 24 * natoms)
    real = 8 if double else 4
    time = struct.unpack(">d" if double else ">f", fh.read(real))[0]
    return natoms, time, 76 + 2 * real + ir + e + box + vir + pres + top_ + sym + x + v + f


def _evenly(times, path) -> float | None:
    if len(times) < 2:
        return None
    steps = np.diff(np.asarray(times, dtype=np.float64))
    dt = float(np.median(steps))
    if dt <= 0 or not np.allclose(steps, dt, rtol=1e-3, atol=1e-6):
        warnings.warn(f"{path}: the time stamps are not evenly spaced (steps from "
                      f"{steps.min():g} to {steps.max():g} ps); no time step is taken from the "
                      f"file", DiagnosticWarning, stacklevel=4)
        return None
    return dt


def index_frames(path) -> FileIndex | None:
    """Check a DCD, XTC or TRR file's structure frame by frame; XTC coordinates are also
    decoded once in a child process (see :func:`_check_xtc_decodes`).

    Returns
    -------
    FileIndex or None
        Frames, atoms and the time between frames in ps (None when the file gives none);
        None for formats not indexed here.

    Raises
    ------
    InputError
        The file is truncated or corrupt (naming the file and the first bad frame).
    """
    path = os.fspath(path)
    suffix = Path(path).suffix.lower()
    if suffix == ".dcd":
        return _index_dcd(path)
    if suffix in (".xtc", ".trr"):
        n, natoms, times = _walk_xdr(path, _xtc_frame if suffix == ".xtc" else _trr_frame)
        if suffix == ".xtc":
            _check_xtc_decodes(path, n)
        return FileIndex(n, natoms, _evenly(times, path))
    return None


#: Run in a separate interpreter: decode every frame of an XTC file and print the count.
_XTC_PROBE = """
import sys
from mdtraj.formats import XTCTrajectoryFile
n = 0
with XTCTrajectoryFile(sys.argv[1]) as fh:
    while True:
        xyz = fh.read(n_frames=256)[0]
        if not len(xyz):
            break
        n += len(xyz)
print(n)
"""


def _check_xtc_decodes(path: str, n_frames: int) -> None:
    """Decode the compressed coordinates of an XTC file once in a child process.

    Damaged compressed data can make mdtraj's XTC decoder write past the end of a buffer and crash
    the interpreter (a segmentation fault, measured on bit-flipped files) or return garbage
    after printing "Buffer overrun during decompression"; neither can be caught in-process.
    The child costs one interpreter start (about 0.5-1.5 s) per XTC file.
    """
    import subprocess
    import sys

    timeout = 60 + os.path.getsize(path) / 2e6  # s; decoding runs at tens of MB/s
    try:
        done = subprocess.run([sys.executable, "-c", _XTC_PROBE, path], capture_output=True,
                              text=True, timeout=timeout)
    except subprocess.TimeoutExpired:
        raise _corrupt(path, f"decoding the compressed coordinates did not finish within "
                             f"{timeout:.0f} s") from None
    except OSError as err:  # no interpreter to start: decode in-process as before
        warnings.warn(f"{path}: the XTC file was not test-decoded apart ({err})", RuntimeWarning,
                      stacklevel=3)
        return
    err_lines = [line for line in done.stderr.splitlines() if line.strip()]
    if done.returncode < 0:
        raise _corrupt(path, f"the XTC decoder crashed on the compressed coordinates (signal "
                             f"{-done.returncode})")
    if done.returncode != 0 or any("error" in line.lower() for line in err_lines):
        why = " ".join((err_lines or ["no message"])[-1].split())
        raise _corrupt(path, f"the compressed coordinates cannot be decoded ({why})")
    decoded = done.stdout.split()[-1] if done.stdout.split() else ""
    if decoded != str(n_frames):
        raise _corrupt(path, f"decoding gave {decoded or 'no'} frames of the {n_frames} the file "
                             f"holds")


# ---------------------------------------------------------------------------------------------
# Reading
# ---------------------------------------------------------------------------------------------

def _check_frames(frames) -> slice:
    if frames is None:
        return slice(0, None, 1)
    if not isinstance(frames, slice):
        raise InputError(f"frames must be a slice such as slice(100, None, 10), but got "
                         f"{frames!r}")
    for part, word in ((frames.start, "start"), (frames.stop, "stop"), (frames.step, "step")):
        if part is not None and (not isinstance(part, (int, np.integer)) or part < 0):
            raise InputError(f"frames: the {word} must be a whole number >= 0 (no negative "
                             f"indices), but got {part!r}")
    if frames.step == 0:
        raise InputError("frames: the step must be at least 1")
    return slice(frames.start or 0, frames.stop, frames.step or 1)


COMPRESSED_SUFFIXES = {".gz": "gzip", ".bz2": "bz2", ".xz": "lzma"}


@contextlib.contextmanager
def _decompressed(path):
    """A plain copy of a .gz/.bz2/.xz file in a temporary folder (streamed, so memory stays
    small), keeping the inner extension that names the format; other paths pass through."""
    if path is None or Path(path).suffix.lower() not in COMPRESSED_SUFFIXES:
        yield None if path is None else os.fspath(path)
        return
    import importlib

    module = importlib.import_module(COMPRESSED_SUFFIXES[Path(path).suffix.lower()])
    with tempfile.TemporaryDirectory(prefix="msmkit-") as tmp:
        plain = os.path.join(tmp, Path(path).stem)
        try:
            with module.open(path, "rb") as src, open(plain, "wb") as dst:
                shutil.copyfileobj(src, dst, 1 << 20)
        except (OSError, EOFError, ValueError) as err:
            raise InputError(f"{path} is truncated or corrupt: it cannot be decompressed "
                             f"({err})") from None
        yield plain


def _refuse_charmm_crd(path):
    if path is None or Path(path).suffix.lower() != ".crd":
        return
    with open(path, errors="replace") as fh:
        first = fh.readline()
    if first.startswith("*"):
        raise InputError(f"{path} is a CHARMM coordinate (.crd) file, which is not read here; "
                         f"write the structure as .pdb (or give the .psf as the topology of a "
                         f".dcd trajectory)")


def read_md_features(path, spec: MDFeatures, *, topology=None, frames=None,
                     chunk_bytes: int = _CHUNK_BYTES):
    """Read one MD trajectory in chunks of frames and compute the features of every frame.

    Compressed files (``.gz``, ``.bz2``, ``.xz``; trajectory or topology) are decompressed to a
    temporary file first. Parameters and returns as :func:`_read_plain`.
    """
    for p in (path, topology):
        _refuse_charmm_crd(p)
    with _decompressed(path) as plain, _decompressed(topology) as plain_top:
        try:
            return _read_plain(plain, spec, topology=plain_top, frames=frames,
                               chunk_bytes=chunk_bytes)
        except InputError as err:
            text = str(err)
            for tmp, original in ((plain, path), (plain_top, topology)):
                if tmp is not None and tmp != os.fspath(original):
                    text = text.replace(tmp, os.fspath(original))
            raise InputError(text) from None


def _read_plain(path, spec: MDFeatures, *, topology=None, frames=None,
                chunk_bytes: int = _CHUNK_BYTES):
    """Read one MD trajectory in chunks of frames and compute the features of every frame.

    Parameters
    ----------
    path : path
        Trajectory file (xtc, trr, dcd, nc, pdb, gro, ...).
    spec : MDFeatures
        The features to compute.
    topology : path, optional
        Structure file; needed for coordinates-only formats.
    frames : slice, optional
        Frame range and step, e.g. ``slice(100, None, 10)``; default every frame.
    chunk_bytes : int
        Coordinates decoded at once, in bytes (bounds the memory used while reading).

    Returns
    -------
    features : (n_frames, n_features) float64 array
    names : list of str
    atoms : list of tuple of int, the atom indices of each feature
    dt : float or None, time between the returned frames in ps (step included)
    """
    md = require_optional("mdtraj", "md", "Reading molecular-dynamics trajectory files")
    path = os.fspath(path)
    suffix = Path(path).suffix.lower()
    frames = _check_frames(frames)
    if topology is None and suffix not in _TOPOLOGY_IN_FILE:
        raise InputError(f"topology is required to read {path}: {suffix} files hold "
                         f"coordinates only; give the structure file (.pdb, .gro, .psf, "
                         f".prmtop, ...) as the topology")
    topology_path = os.fspath(topology) if topology is not None else path
    index = index_frames(path)
    try:
        top = md.load_topology(topology_path)
    except Exception as err:  # mdtraj raises many types for unreadable files
        raise _md_error(topology_path, err, "or is not a structure file") from None
    if index is not None and index.n_atoms != top.n_atoms:
        raise InputError(f"{path} has {index.n_atoms} atoms per frame but the topology "
                         f"{topology_path} has {top.n_atoms}; give the topology of this system")
    kwargs = {"top": top}
    text = suffix in (".pdb", ".gro")  # text files without random access: read whole
    try:
        if text:
            everything = md.load(path, **kwargs)
            first = everything[frames.start:frames.start + 1]
            if not first.n_frames:
                raise InputError(f"{path} holds {everything.n_frames} frames; frames starts "
                                 f"at {frames.start}")
        else:
            first = md.load_frame(path, frames.start, **kwargs)
    except InputError:
        raise
    except Exception as err:
        raise _md_error(path, err) from None
    plan = _plan(md, first, spec, topology_path if topology is not None else path)
    local = np.full(top.n_atoms, -1, dtype=np.int64)
    local[plan.read_atoms] = np.arange(len(plan.read_atoms))
    per_chunk = max(1, int(chunk_bytes) // (12 * top.n_atoms))
    wanted = None if frames.stop is None else len(range(frames.start, frames.stop, frames.step))
    expected = None if index is None else len(range(
        frames.start, index.n_frames if frames.stop is None else min(frames.stop, index.n_frames),
        frames.step))
    # filled in place when the file's structure gives the frame count (no second copy)
    out = None if expected is None else np.empty((expected, len(plan.names)))
    blocks, warned, n_read = [], set(), 0
    try:
        if text:
            kept = everything.atom_slice(plan.read_atoms)[frames]
            del everything
            chunks = (kept[i:i + per_chunk] for i in range(0, kept.n_frames, per_chunk))
        else:
            chunks = md.iterload(path, chunk=per_chunk, atom_indices=plan.read_atoms,
                                 stride=frames.step, skip=frames.start, **kwargs)
        for chunk in chunks:
            if wanted is not None and n_read + chunk.n_frames > wanted:
                chunk = chunk[:wanted - n_read]
            if not np.isfinite(chunk.xyz).all() or np.abs(chunk.xyz).max() > 1e5:
                raise _corrupt(path, f"frames {frames.start + n_read * frames.step} onwards "
                                     f"hold non-numbers or coordinates beyond 100,000 nm")
            block = _compute(md, chunk, plan, spec, local, path, warned)
            if out is None:
                blocks.append(block)
            elif n_read + len(block) > expected:
                raise _corrupt(path, f"mdtraj read more frames than the {expected} the file "
                                     f"holds")
            else:
                out[n_read:n_read + len(block)] = block
            n_read += chunk.n_frames
            if wanted is not None and n_read >= wanted:
                break
    except InputError:
        raise
    except Exception as err:
        raise _md_error(path, err) from None
    if expected is not None and n_read != expected:
        raise _corrupt(path, f"mdtraj read {n_read} of the {expected} frames the file holds")
    if not n_read:
        raise InputError(f"{path} holds no frames in the range {frames.start}:"
                         f"{'' if frames.stop is None else frames.stop}:{frames.step}")
    dt = index.dt if index is not None else _time_step(first, path, md, kwargs)
    features = out if out is not None else np.vstack(blocks)
    return features, plan.names, plan.atoms, None if dt is None else dt * frames.step


def _time_step(first, path, md, kwargs):
    """Time between frames (ps) from the time stamps of formats mdtraj reads them for."""
    if Path(path).suffix.lower() not in (".nc", ".ncdf", ".netcdf", ".h5", ".lh5"):
        return None
    try:
        second = md.load_frame(path, 1, **kwargs)
    except Exception:
        return None
    dt = float(second.time[0] - first.time[0])
    return dt if dt > 0 else None


def _md_error(path, err, alternative="or does not match the topology") -> InputError:
    # a parser's own IndexError/TypeError text ("string index out of range") says nothing
    text = " ".join(str(err).split())  # one line, whatever the parser wrote
    why = f" ({text})" if isinstance(err, (OSError, RuntimeError)) or type(err) is ValueError else ""
    return InputError(f"cannot read {path}: the file is truncated or corrupt, {alternative}{why}")
