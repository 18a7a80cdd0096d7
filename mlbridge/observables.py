"""Structural observables of trajectories, in plain NumPy: torsions, RDFs, H-bonds, RMSD.

These are the numbers the comparison of treatments reads (DESIGN.md section 1): torsion
distributions of the ligand, ligand-water radial distribution functions, ligand-water
hydrogen-bond counts and the ligand's RMSD from its start structure.

Conventions
===========
=================  ======================  ==================================================
argument           shape                   unit / meaning
=================  ======================  ==================================================
traj               (n_frames, n_atoms, 3)  nm, positions as written by OpenMM (may be wrapped)
boxes              (n_frames, 3, 3)        nm, periodic box vectors as rows (a, b, c), or None
                                           for no periodicity; a single (3, 3) box is
                                           broadcast to every frame
atom indices       int                     0-based indices into the atoms of ``traj``
angles             degrees                 dihedrals in [-180, 180)
=================  ======================  ==================================================

Periodic boundaries
===================
Distances use the minimum-image convention through fractional coordinates,
``d -> d - round(d B^-1) B`` (B: box vectors as rows). This is exact for orthorhombic boxes and,
for any triclinic box, exact for every pair whose minimum-image distance is below half the
shortest box height h_min = V / max(|a x b|, |b x c|, |c x a|) (the ball of that radius lies in
the fractional cell centred on the origin, which holds exactly one image of each point). Longer
distances in skewed boxes may come out as a longer image. Functions that depend on it
(:func:`radial_distribution`) refuse cutoffs beyond h_min / 2.

A ligand written by OpenMM may be split across the box. Torsions and RMSD first make it whole
by moving every selected atom to the image nearest to the first selected atom (see
:func:`unwrap_around_first`); this is right for a molecule whose extent is below half the
shortest box height, which holds for the small ligands mlbridge simulates in their water box.
"""
from __future__ import annotations

from typing import Iterable, Optional, Sequence

import numpy as np

__all__ = [
    "minimum_image",
    "box_heights",
    "unwrap_around_first",
    "dihedral_angles",
    "rotatable_torsions",
    "torsion_histogram",
    "radial_distribution",
    "hydrogen_bond_count",
    "hydrogen_bond_counts",
    "rmsd_from_start",
    "kabsch_rmsd",
    "ligand_polar_atoms",
    "water_atoms",
    "HBOND_DISTANCE_NM",
    "HBOND_ANGLE_DEG",
    "STRICT_ROTATABLE_SMARTS",
]

#: Donor-acceptor distance cutoff of the geometric H-bond criterion (common practice; the
#: default of GROMACS ``gmx hbond``: r(D-A) <= 0.35 nm, angle H-D-A <= 30 degrees).
HBOND_DISTANCE_NM = 0.35
#: H-D-A angle cutoff of the geometric H-bond criterion, degrees (common practice, as above).
HBOND_ANGLE_DEG = 30.0

#: RDKit's "strict" rotatable-bond SMARTS (the pattern behind
#: ``rdMolDescriptors.CalcNumRotatableBonds(mol, NumRotatableBondsOptions.Strict)`` in
#: RDKit's Code/GraphMol/Descriptors/Lipinski.cpp): a non-ring single bond between two atoms
#: with at least two heavy neighbours each, excluding triple-bond atoms, CX3 and t-butyl
#: groups, and amide/ester/thioester/amidine C(=X)-Y bonds (partial double-bond character).
STRICT_ROTATABLE_SMARTS = (
    "[!$(*#*)&!D1&!$(C(F)(F)F)&!$(C(Cl)(Cl)Cl)&!$(C(Br)(Br)Br)&!$(C([CH3])([CH3])[CH3])"
    "&!$([CD3](=[N,O,S])-!@[#7,O,S!D1])&!$([#7,O,S!D1]-!@[CD3]=[N,O,S])"
    "&!$([CD3](=[N+])-!@[#7!D1])&!$([#7!D1]-!@[CD3]=[N+])]"
    "-!@"
    "[!$(*#*)&!D1&!$(C(F)(F)F)&!$(C(Cl)(Cl)Cl)&!$(C(Br)(Br)Br)&!$(C([CH3])([CH3])[CH3])]"
)

#: pairs evaluated at once in distance arrays (bounds memory to ~100 MB of float64 vectors)
_PAIR_BUDGET = 4_000_000

#: residue names of water in OpenMM topologies (TIP3P from Modeller/PDBFixer, AMBER files)
WATER_RESIDUE_NAMES = ("HOH", "WAT")


# ---------------------------------------------------------------------------------------
# periodic helpers
# ---------------------------------------------------------------------------------------
def _as_traj(traj) -> np.ndarray:
    x = np.asarray(_strip_unit(traj, "nanometer"), dtype=float)
    if x.ndim == 2:
        x = x[None]
    if x.ndim != 3 or x.shape[-1] != 3:
        raise ValueError(f"trajectory must have shape (n_frames, n_atoms, 3), got {x.shape}")
    return x


def _strip_unit(value, unit_name: str):
    """Accept openmm.unit Quantities (converted to `unit_name`) or plain numbers."""
    if hasattr(value, "value_in_unit"):
        from openmm import unit

        return value.value_in_unit(getattr(unit, unit_name))
    return value


def _as_boxes(boxes, n_frames: int) -> Optional[np.ndarray]:
    if boxes is None:
        return None
    b = np.asarray(_strip_unit(boxes, "nanometer"), dtype=float)
    if b.shape == (3, 3):
        b = np.broadcast_to(b, (n_frames, 3, 3))
    elif b.shape == (3,):  # orthorhombic box lengths
        b = np.broadcast_to(np.diag(b), (n_frames, 3, 3))
    if b.shape != (n_frames, 3, 3):
        raise ValueError(
            f"boxes must have shape ({n_frames}, 3, 3) (box vectors as rows per frame) or (3, 3), "
            f"got {b.shape}"
        )
    return b


def box_heights(box: np.ndarray) -> np.ndarray:
    """Heights (nm) of the box(es) between opposite faces: V / |b x c|, V / |c x a|, V / |a x b|."""
    box = np.asarray(box, dtype=float)
    a, b, c = box[..., 0, :], box[..., 1, :], box[..., 2, :]
    vol = np.abs(np.einsum("...i,...i->...", a, np.cross(b, c)))
    areas = np.stack(
        [np.linalg.norm(np.cross(b, c), axis=-1), np.linalg.norm(np.cross(c, a), axis=-1),
         np.linalg.norm(np.cross(a, b), axis=-1)],
        axis=-1,
    )
    return vol[..., None] / areas


def minimum_image(d: np.ndarray, box: Optional[np.ndarray]) -> np.ndarray:
    """Minimum-image displacement vectors.

    Parameters
    ----------
    d : (..., 3) array, nm, displacement vectors
    box : (3, 3) array (box vectors as rows) or (n_frames, 3, 3) with ``d`` of shape
        (n_frames, ..., 3); None for no periodicity

    Returns
    -------
    (..., 3) array, nm: ``d - round(d B^-1) B``; exact for orthorhombic boxes and, in triclinic
    boxes, for minimum-image distances below half the shortest box height.
    """
    d = np.asarray(d, dtype=float)
    if box is None:
        return d
    box = np.asarray(box, dtype=float)
    inv = np.linalg.inv(box)
    if box.ndim == 2:
        s = d @ inv
        return d - np.round(s) @ box
    # one box per frame: d has shape (n_frames, ..., 3)
    n = box.shape[0]
    flat = d.reshape(n, -1, 3)
    s = np.einsum("fni,fij->fnj", flat, inv)
    flat = flat - np.einsum("fni,fij->fnj", np.round(s), box)
    return flat.reshape(d.shape)


def unwrap_around_first(traj, boxes, atoms: Optional[Sequence[int]] = None) -> np.ndarray:
    """Coordinates of `atoms` made whole: each atom moved to its image nearest the first atom.

    Parameters
    ----------
    traj : (n_frames, n_atoms, 3) array, nm
    boxes : (n_frames, 3, 3) array, nm, or None (then the coordinates are returned unchanged)
    atoms : sequence of int, the molecule's atoms (default: all atoms)

    Returns
    -------
    (n_frames, len(atoms), 3) array, nm. Correct when the molecule's extent from its first atom
    is below half the shortest box height (true for a small ligand in its water box).
    """
    x = _as_traj(traj)
    idx = np.arange(x.shape[1]) if atoms is None else np.asarray(list(atoms), dtype=int)
    sel = x[:, idx, :]
    b = _as_boxes(boxes, x.shape[0])
    if b is None:
        return sel.copy()
    rel = minimum_image(sel - sel[:, :1, :], b)
    return sel[:, :1, :] + rel


# ---------------------------------------------------------------------------------------
# torsions
# ---------------------------------------------------------------------------------------
def dihedral_angles(traj, quartets: Iterable[Sequence[int]], boxes=None) -> np.ndarray:
    """Dihedral angles of atom quartets, IUPAC sign convention.

    For atoms (i, j, k, l) with b1 = x_j - x_i, b2 = x_k - x_j, b3 = x_l - x_k,

        phi = atan2( |b2| b1 . (b2 x b3),  (b1 x b2) . (b2 x b3) )

    which is positive when, looking along j -> k, the bond j-i must be turned clockwise (by less
    than 180 degrees) to eclipse the bond k-l (IUPAC, Pure Appl. Chem. 68, 2193 (1996); the
    formula is that of Blondel & Karplus, J. Comput. Chem. 17, 1132 (1996)). The bond vectors
    use the minimum image when `boxes` is given, so a wrapped ligand needs no unwrapping here.

    Parameters
    ----------
    traj : (n_frames, n_atoms, 3) array, nm (a single (n_atoms, 3) frame is accepted)
    quartets : sequence of (i, j, k, l) atom indices
    boxes : (n_frames, 3, 3) array, nm, or None

    Returns
    -------
    (n_frames, n_quartets) array of angles in degrees, in [-180, 180]
    """
    x = _as_traj(traj)
    q = np.asarray(list(quartets), dtype=int).reshape(-1, 4)
    b = _as_boxes(boxes, x.shape[0])
    b1 = minimum_image(x[:, q[:, 1]] - x[:, q[:, 0]], b)
    b2 = minimum_image(x[:, q[:, 2]] - x[:, q[:, 1]], b)
    b3 = minimum_image(x[:, q[:, 3]] - x[:, q[:, 2]], b)
    n1 = np.cross(b1, b2)
    n2 = np.cross(b2, b3)
    y = np.linalg.norm(b2, axis=-1) * np.einsum("fqi,fqi->fq", b1, n2)
    xx = np.einsum("fqi,fqi->fq", n1, n2)
    return np.degrees(np.arctan2(y, xx))


def rotatable_torsions(mol, polar_hydrogens: bool = True, include_amide: bool = False) -> list:
    """One dihedral quartet (i, j, k, l) per rotatable bond j-k of an RDKit molecule.

    Which bonds
    -----------
    - Every bond matched by RDKit's strict rotatable-bond SMARTS (:data:`STRICT_ROTATABLE_SMARTS`;
      the count equals ``CalcNumRotatableBonds(mol, Strict)``), matched on the heavy-atom graph
      so the result does not depend on whether hydrogens are explicit. It leaves out terminal
      groups (CH3, OH, NH2, halogens), CX3/t-butyl rotors, ring bonds and amide/ester C(=O)-X
      bonds.
    - ``polar_hydrogens=True`` (default) adds the X-H rotors of terminal OH, NH/NH2/NH3+ and SH
      groups (X with one heavy neighbour, non-ring single bond), because their orientation
      decides which hydrogen bonds the ligand donates to water, which a chemist comparing
      treatments will want to see (e.g. the phenol OH of acetaminophen). Carboxylic-acid OH and
      primary-amide NH2 are left out for the same reason the strict pattern leaves out amides
      and esters (partial double bond, a syn/anti or planar preference rather than a rotor).
      These need explicit hydrogens; without them no polar-H rotor is returned.
    - ``include_amide=True`` adds the amide C(=O)-N bonds (the omega torsion: cis/trans
      isomerism, barrier ~80 kJ/mol) that RDKit's strict pattern excludes; off by default.

    Which atoms
    -----------
    For bond j-k (j < k in the pattern match order), i is a neighbour of j other than k and l a
    neighbour of k other than j; heavy atoms are preferred, then the larger atomic number, then
    the lower index (deterministic). Polar-H rotors end on the hydrogen.

    Returns
    -------
    list of (i, j, k, l) tuples of atom indices of `mol`
    """
    from rdkit import Chem

    heavy, to_orig = _heavy_graph(mol)
    pattern = Chem.MolFromSmarts(STRICT_ROTATABLE_SMARTS)
    bonds = [(to_orig[a], to_orig[b]) for a, b in heavy.GetSubstructMatches(pattern)]
    if include_amide:
        amide = Chem.MolFromSmarts("[CX3](=O)-!@[NX3]")
        for c, _o, n in heavy.GetSubstructMatches(amide):
            bonds.append((to_orig[c], to_orig[n]))

    quartets = []
    seen = set()
    for j, k in bonds:
        key = frozenset((j, k))
        if key in seen:
            continue
        seen.add(key)
        i = _pick_neighbour(mol, j, exclude=k)
        l = _pick_neighbour(mol, k, exclude=j)
        if i is not None and l is not None:
            quartets.append((i, j, k, l))

    if polar_hydrogens:
        acid_like = Chem.MolFromSmarts("[CX3](=[O,S,N])-[O,S,N]")
        conjugated = {m[2] for m in mol.GetSubstructMatches(acid_like)}
        for atom in mol.GetAtoms():
            if atom.GetAtomicNum() not in (7, 8, 16) or atom.IsInRing():
                continue
            heavy_nb = [n for n in atom.GetNeighbors() if n.GetAtomicNum() > 1]
            h_nb = [n for n in atom.GetNeighbors() if n.GetAtomicNum() == 1]
            if len(heavy_nb) != 1 or not h_nb or atom.GetIdx() in conjugated:
                continue
            j = heavy_nb[0].GetIdx()
            k = atom.GetIdx()
            bond = mol.GetBondBetweenAtoms(j, k)
            if bond.GetBondType() != Chem.BondType.SINGLE or frozenset((j, k)) in seen:
                continue
            i = _pick_neighbour(mol, j, exclude=k)
            if i is None:
                continue
            seen.add(frozenset((j, k)))
            quartets.append((i, j, k, min(n.GetIdx() for n in h_nb)))
    return quartets


def _heavy_graph(mol):
    """Hydrogen-free copy of `mol` and the map from its atom indices to those of `mol`."""
    from rdkit import Chem

    work = Chem.Mol(mol)
    for atom in work.GetAtoms():
        atom.SetIntProp("_mlbridge_idx", atom.GetIdx())
    heavy = Chem.RemoveHs(work, sanitize=False)
    heavy.UpdatePropertyCache(strict=False)
    Chem.FastFindRings(heavy)
    # RemoveHs keeps a few hydrogens (isotopes such as D, H bonded to H); they then count as
    # neighbours in the pattern's degree test, which is what RDKit's own count does too
    to_orig = [a.GetIntProp("_mlbridge_idx") for a in heavy.GetAtoms()]
    return heavy, to_orig


def _pick_neighbour(mol, center: int, exclude: int) -> Optional[int]:
    nbs = [n for n in mol.GetAtomWithIdx(center).GetNeighbors() if n.GetIdx() != exclude]
    if not nbs:
        return None
    nbs.sort(key=lambda n: (n.GetAtomicNum() == 1, -n.GetAtomicNum(), n.GetIdx()))
    return nbs[0].GetIdx()


def torsion_histogram(angles_deg, bins: int = 36):
    """Normalised histogram of dihedral angles on [-180, 180).

    Parameters
    ----------
    angles_deg : (n_frames,) or (n_frames, n_quartets) array, degrees
    bins : int, number of equal bins over 360 degrees (36 -> 10 degree bins)

    Returns
    -------
    edges : (bins + 1,) array, degrees, from -180 to 180
    density : (bins,) or (n_quartets, bins) array, 1/degree; sum(density * width) = 1 per torsion
    """
    a = np.asarray(angles_deg, dtype=float)
    wrapped = (a + 180.0) % 360.0 - 180.0  # 180 -> -180: the same angle
    edges = np.linspace(-180.0, 180.0, int(bins) + 1)
    width = edges[1] - edges[0]

    def one(col):
        counts, _ = np.histogram(col, bins=edges)
        total = counts.sum()
        return counts / (total * width) if total else counts.astype(float)

    if wrapped.ndim == 1:
        return edges, one(wrapped)
    if wrapped.ndim == 2:
        return edges, np.stack([one(wrapped[:, q]) for q in range(wrapped.shape[1])])
    raise ValueError(f"angles must be (n_frames,) or (n_frames, n_quartets), got {a.shape}")


# ---------------------------------------------------------------------------------------
# radial distribution
# ---------------------------------------------------------------------------------------
def radial_distribution(traj, boxes, group_a, group_b, r_max_nm, n_bins: int = 100):
    """Radial distribution function g_AB(r) with the minimum image and ideal-gas normalisation.

        g_AB(r) = < n_AB(r, r + dr) > / ( N_pairs * 4/3 pi ((r + dr)^3 - r^3) / V )

    where n_AB counts ordered pairs (a in A, b in B, a != b) at minimum-image distance in the
    shell, N_pairs = N_A N_B - |A & B| and the average over frames weights each frame by its
    own volume V. For uncorrelated (ideal-gas) points g -> 1 at every r; for a liquid it tends
    to 1 at long range. Self pairs are excluded; intramolecular pairs are not.

    Parameters
    ----------
    traj : (n_frames, n_atoms, 3) array, nm
    boxes : (n_frames, 3, 3) array, nm (box vectors as rows), or one (3, 3) box
    group_a, group_b : sequences of atom indices
    r_max_nm : distance, nm; must be below half the shortest box height of every frame (the
        minimum image is exact there for any triclinic box)
    n_bins : int

    Returns
    -------
    r_centers_nm : (n_bins,) array, nm
    g : (n_bins,) array, dimensionless
    """
    x = _as_traj(traj)
    b = _as_boxes(boxes, x.shape[0])
    if b is None:
        raise ValueError("radial_distribution needs periodic boxes (the normalisation uses V)")
    r_max = float(_strip_unit(r_max_nm, "nanometer"))
    h_min = box_heights(b).min()
    if not 0 < r_max < 0.5 * h_min:
        raise ValueError(
            f"r_max_nm = {r_max:g} nm must be positive and below half the shortest box height "
            f"({0.5 * h_min:.4g} nm), where the minimum image is exact; use a smaller r_max"
        )
    ia = np.unique(np.asarray(list(group_a), dtype=int))  # a repeated index counts once
    ib = np.unique(np.asarray(list(group_b), dtype=int))
    n_pairs = ia.size * ib.size - np.intersect1d(ia, ib).size
    if n_pairs <= 0:
        raise ValueError("group_a and group_b give no distinct pairs")
    edges = np.linspace(0.0, r_max, int(n_bins) + 1)
    counts = np.zeros(int(n_bins))
    ideal = np.zeros(int(n_bins))
    shell = 4.0 / 3.0 * np.pi * (edges[1:] ** 3 - edges[:-1] ** 3)
    block = max(1, _PAIR_BUDGET // max(1, ib.size))  # rows of group A per distance block
    for f in range(x.shape[0]):
        xb = x[f, ib]
        for s in range(0, ia.size, block):
            rows = ia[s:s + block]
            d = minimum_image(xb[None, :, :] - x[f, rows][:, None, :], b[f])
            r = np.sqrt(np.einsum("abi,abi->ab", d, d))[rows[:, None] != ib[None, :]]
            counts += np.histogram(r, bins=edges)[0]
        ideal += n_pairs * shell / abs(np.linalg.det(b[f]))
    centers = 0.5 * (edges[1:] + edges[:-1])
    return centers, counts / ideal


# ---------------------------------------------------------------------------------------
# hydrogen bonds
# ---------------------------------------------------------------------------------------
def _hbond_count_frames(x, box, dh, acc, r_cut, angle_cut_deg):
    """(n_frames,) H-bond counts for a block of frames.

    D-A distances are computed once per distinct donor heavy atom; the H-D-A angle only for
    the few pairs within the distance cutoff.
    """
    n_f = x.shape[0]
    if dh.size == 0 or acc.size == 0:
        return np.zeros(n_f, dtype=int)
    ud, inv = np.unique(dh[:, 0], return_inverse=True)
    v_da = minimum_image(x[:, acc][:, None, :, :] - x[:, ud][:, :, None, :], box)  # (f,u,a,3)
    close = (np.einsum("fuai,fuai->fua", v_da, v_da) < r_cut * r_cut) & (
        ud[:, None] != acc[None, :]
    )[None]
    f_i, p_i, a_i = np.nonzero(close[:, inv, :])  # candidate (frame, donor pair, acceptor)
    if f_i.size == 0:
        return np.zeros(n_f, dtype=int)
    v_dh = minimum_image(x[:, dh[:, 1]] - x[:, dh[:, 0]], box)  # (f, n_pairs, 3)
    a = v_dh[f_i, p_i]
    bvec = v_da[f_i, inv[p_i], a_i]
    cos = np.einsum("ni,ni->n", a, bvec) / np.maximum(
        np.linalg.norm(a, axis=-1) * np.linalg.norm(bvec, axis=-1), 1e-300
    )
    hit = cos > np.cos(np.radians(angle_cut_deg))
    return np.bincount(f_i[hit], minlength=n_f)


def hydrogen_bond_counts(
    traj,
    boxes,
    donors,
    acceptors,
    *,
    distance_nm: float = HBOND_DISTANCE_NM,
    angle_deg: float = HBOND_ANGLE_DEG,
    chunk: Optional[int] = None,
) -> np.ndarray:
    """Number of hydrogen bonds D-H...A in each frame, by a geometric criterion.

    A triple (D, H, A) with A != D is an H-bond when r(D-A) < `distance_nm` (0.35 nm) and the
    angle H-D-A < `angle_deg` (30 degrees), both with the minimum image. This is common
    practice (it is the default criterion of GROMACS ``gmx hbond``); it is geometric, with no
    energy threshold. Each (D, H, A) triple counts once.

    Parameters
    ----------
    traj : (n_frames, n_atoms, 3) array, nm
    boxes : (n_frames, 3, 3) or (3, 3) array, nm, or None
    donors : sequence of (D, H) index pairs (donor heavy atom, its hydrogen)
    acceptors : sequence of acceptor atom indices
    distance_nm, angle_deg : the criterion
    chunk : int, frames evaluated together; default: as many as keep
        chunk * n_donor_pairs * n_acceptors below a few million (memory bound)

    Returns
    -------
    (n_frames,) int array
    """
    x = _as_traj(traj)
    b = _as_boxes(boxes, x.shape[0])
    out = np.zeros(x.shape[0], dtype=int)
    donors = np.asarray(list(donors), dtype=int).reshape(-1, 2)
    acceptors = np.asarray(list(acceptors), dtype=int).reshape(-1)
    n_triples = max(1, donors.shape[0] * acceptors.size)
    step = max(1, int(chunk) if chunk is not None else _PAIR_BUDGET // n_triples)
    for s in range(0, x.shape[0], step):
        sl = slice(s, s + step)
        out[sl] = _hbond_count_frames(x[sl], None if b is None else b[sl], donors, acceptors,
                                      float(distance_nm), float(angle_deg))
    return out


def hydrogen_bond_count(frame_positions, box, donors, acceptors, **criterion) -> int:
    """Number of hydrogen bonds in one frame; see :func:`hydrogen_bond_counts`.

    Parameters
    ----------
    frame_positions : (n_atoms, 3) array, nm
    box : (3, 3) array, nm (box vectors as rows), or None
    donors, acceptors, criterion : as in :func:`hydrogen_bond_counts`
    """
    x = np.asarray(_strip_unit(frame_positions, "nanometer"), dtype=float)[None]
    b = None if box is None else np.asarray(_strip_unit(box, "nanometer"), dtype=float)[None]
    return int(hydrogen_bond_counts(x, b, donors, acceptors, **criterion)[0])


def ligand_polar_atoms(mol, offset: int = 0):
    """H-bond donors and acceptors of a ligand, from its RDKit molecule (explicit hydrogens).

    Donors are (X, H) pairs for every hydrogen on N or O; acceptors are the N and O atoms,
    except positively charged N (ammonium, no lone pair) and N with four bonds. This is the
    usual geometric-analysis choice (amide N and aromatic N count as acceptors; a finer
    chemistry-aware choice would drop the amide N).

    Parameters
    ----------
    mol : rdkit.Chem.Mol with explicit hydrogens
    offset : int, index of the ligand's first atom in the system (added to every index)

    Returns
    -------
    donors : list of (D, H) system indices
    acceptors : list of system indices
    """
    donors, acceptors = [], []
    for atom in mol.GetAtoms():
        if atom.GetAtomicNum() not in (7, 8):
            continue
        i = atom.GetIdx()
        for n in atom.GetNeighbors():
            if n.GetAtomicNum() == 1:
                donors.append((i + offset, n.GetIdx() + offset))
        if atom.GetAtomicNum() == 7 and (atom.GetFormalCharge() > 0 or atom.GetDegree() >= 4):
            continue
        acceptors.append(i + offset)
    return donors, acceptors


def water_atoms(topology, residue_names: Sequence[str] = WATER_RESIDUE_NAMES):
    """Water oxygens and their (O, H) donor pairs from an OpenMM Topology.

    Parameters
    ----------
    topology : openmm.app.Topology
    residue_names : residue names that mean water (default HOH, WAT)

    Returns
    -------
    oxygens : list of atom indices (the acceptors)
    donors : list of (O, H) atom-index pairs
    """
    names = set(residue_names)
    oxygens, donors = [], []
    for residue in topology.residues():
        if residue.name not in names:
            continue
        o = [a.index for a in residue.atoms() if a.element is not None and a.element.symbol == "O"]
        h = [a.index for a in residue.atoms() if a.element is not None and a.element.symbol == "H"]
        if len(o) != 1:
            continue  # not a 3-site-like water (virtual sites are fine; they have no element)
        oxygens.append(o[0])
        donors.extend((o[0], hi) for hi in h)
    return oxygens, donors


# ---------------------------------------------------------------------------------------
# RMSD
# ---------------------------------------------------------------------------------------
def kabsch_rmsd(mobile: np.ndarray, reference: np.ndarray, weights=None) -> np.ndarray:
    """RMSD after optimal rigid superposition (Kabsch), batched over frames.

    Parameters
    ----------
    mobile : (n_frames, n, 3) or (n, 3) array, nm
    reference : (n, 3) array, nm
    weights : (n,) array or None (equal weights), e.g. masses

    Returns
    -------
    (n_frames,) array, nm: min over rotations R and translations t of
    sqrt( sum_i w_i |R p_i + t - q_i|^2 / sum_i w_i ).

    References
    ----------
    W. Kabsch, Acta Cryst. A32, 922 (1976); the reflection correction of Acta Cryst. A34, 827
    (1978).
    """
    p = np.asarray(mobile, dtype=float)
    if p.ndim == 2:
        p = p[None]
    q = np.asarray(reference, dtype=float)
    w = np.ones(q.shape[0]) if weights is None else np.asarray(weights, dtype=float)
    if w.shape != (q.shape[0],) or np.any(w < 0) or w.sum() <= 0:
        raise ValueError("weights must be non-negative, one per atom, not all zero")
    w = w / w.sum()
    pc = p - np.einsum("i,fij->fj", w, p)[:, None, :]
    qc = q - w @ q
    h = np.einsum("i,fij,ik->fjk", w, pc, qc)  # (f, 3, 3) weighted covariance
    u, s, vt = np.linalg.svd(h)
    sign = np.sign(np.linalg.det(u @ vt))
    s[:, -1] *= np.where(sign == 0, 1.0, sign)
    msd = np.einsum("i,fij,fij->f", w, pc, pc) + w @ np.einsum("ij,ij->i", qc, qc) - 2 * s.sum(-1)
    return np.sqrt(np.maximum(msd, 0.0))


def rmsd_from_start(traj, atoms: Optional[Sequence[int]] = None, masses=None, boxes=None):
    """RMSD (nm) of `atoms` in each frame from their positions in the first frame.

    The selection is made whole first (each atom to the image nearest the first selected atom,
    when `boxes` is given), then superposed optimally on frame 0 (Kabsch, mass-weighted when
    `masses` is given).

    Parameters
    ----------
    traj : (n_frames, n_atoms, 3) array, nm
    atoms : sequence of int, default all atoms
    masses : (len(atoms),) array, daltons, or None for equal weights
    boxes : (n_frames, 3, 3) array, nm, or None

    Returns
    -------
    (n_frames,) array, nm (0 for frame 0)
    """
    sel = unwrap_around_first(traj, boxes, atoms)
    return kabsch_rmsd(sel, sel[0], masses)
