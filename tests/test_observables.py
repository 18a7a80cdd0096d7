"""Tests of mlbridge.observables on constructed cases with known answers."""
import numpy as np
import pytest

from mlbridge import observables as obs

Chem = pytest.importorskip("rdkit.Chem")
from rdkit.Chem import AllChem, rdMolDescriptors, rdMolTransforms  # noqa: E402


def _rotation(axis, angle_rad):
    axis = np.asarray(axis, float) / np.linalg.norm(axis)
    k = np.array([[0, -axis[2], axis[1]], [axis[2], 0, -axis[0]], [-axis[1], axis[0], 0]])
    return np.eye(3) + np.sin(angle_rad) * k + (1 - np.cos(angle_rad)) * k @ k


# ---------------------------------------------------------------------------------------
# dihedrals
# ---------------------------------------------------------------------------------------
def _butane_like(phi_deg):
    """4 points: bond j-k along +z, i-j along x, k-l rotated by phi about +z."""
    phi = np.radians(phi_deg)
    p1 = np.array([0.0, 0.0, 0.0])
    p2 = np.array([0.0, 0.0, 0.153])
    p0 = p1 + np.array([0.15, 0.0, -0.05])
    p3 = p2 + np.array([0.15 * np.cos(phi), 0.15 * np.sin(phi), 0.05])
    return np.array([p0, p1, p2, p3])


@pytest.mark.parametrize("phi", [60.0, -60.0, 180.0 - 1e-9, 0.0, 120.0, -150.0])
def test_dihedral_known_angle_and_iupac_sign(phi):
    x = _butane_like(phi)
    got = obs.dihedral_angles(x[None], [(0, 1, 2, 3)])
    assert got.shape == (1, 1)
    assert got[0, 0] == pytest.approx(phi, abs=1e-9)


def test_dihedral_sign_agrees_with_rdkit():
    """Independent route: RDKit's GetDihedralDeg (IUPAC sign) on an embedded butane."""
    mol = Chem.AddHs(Chem.MolFromSmiles("CCCC"))
    AllChem.EmbedMolecule(mol, randomSeed=3)
    conf = mol.GetConformer()
    rdMolTransforms.SetDihedralDeg(conf, 0, 1, 2, 3, 65.0)
    x = conf.GetPositions() * 0.1
    quartets = [(0, 1, 2, 3), (4, 0, 1, 2), (0, 1, 2, 10)]
    got = obs.dihedral_angles(x, quartets)[0]
    want = [rdMolTransforms.GetDihedralDeg(conf, *q) for q in quartets]
    np.testing.assert_allclose(got, want, atol=1e-8)
    assert got[0] == pytest.approx(65.0, abs=1e-6)


def test_dihedral_across_periodic_boundary():
    box = np.eye(3) * 2.0
    x = _butane_like(60.0) + np.array([1.95, 1.0, 1.0])  # straddles the x = 2 face
    wrapped = x.copy()
    wrapped[:, 0] %= 2.0
    got = obs.dihedral_angles(wrapped[None], [(0, 1, 2, 3)], boxes=box[None])
    assert got[0, 0] == pytest.approx(60.0, abs=1e-9)


def test_torsion_histogram_of_fixed_geometry_is_one_bin():
    x = np.repeat(_butane_like(63.0)[None], 50, axis=0)
    angles = obs.dihedral_angles(x, [(0, 1, 2, 3)])
    edges, density = obs.torsion_histogram(angles, bins=36)
    assert edges[0] == -180.0 and edges[-1] == 180.0 and len(edges) == 37
    assert density.shape == (1, 36)
    nonzero = np.flatnonzero(density[0])
    assert nonzero.tolist() == [24]  # the 60..70 degree bin
    assert density[0, 24] * (edges[1] - edges[0]) == pytest.approx(1.0)
    # 1-D input, and 180 is the same bin as -180
    edges, d1 = obs.torsion_histogram(np.full(10, 180.0), bins=36)
    assert np.flatnonzero(d1).tolist() == [0]


# ---------------------------------------------------------------------------------------
# rotatable torsions
# ---------------------------------------------------------------------------------------
def test_rotatable_torsions_known_counts():
    # butane: one rotatable C-C bond (terminal CH3 rotors are not counted)
    butane = Chem.AddHs(Chem.MolFromSmiles("CCCC"))
    assert obs.rotatable_torsions(butane, polar_hydrogens=False) == [(0, 1, 2, 3)]
    # acetaminophen: N-C(aryl) is the one strict rotor (the amide C(=O)-N and the CH3 are
    # not); the phenol O-H adds one polar-hydrogen rotor
    apap = Chem.AddHs(Chem.MolFromSmiles("CC(=O)Nc1ccc(O)cc1"))
    strict = obs.rotatable_torsions(apap, polar_hydrogens=False)
    assert len(strict) == 1 and strict[0][1:3] == (4, 3)
    polar = obs.rotatable_torsions(apap)
    assert len(polar) == 2
    assert [apap.GetAtomWithIdx(i).GetSymbol() for i in polar[1]] == ["C", "C", "O", "H"]
    with_amide = obs.rotatable_torsions(apap, polar_hydrogens=False, include_amide=True)
    assert len(with_amide) == 2


@pytest.mark.parametrize(
    "smiles",
    [
        "CCCC",
        "CC(=O)Nc1ccc(O)cc1",
        "CC(C)Cc1ccc(cc1)C(C)C(=O)O",  # ibuprofen
        "CC(=O)Oc1ccccc1C(=O)O",  # aspirin
        "Cn1cnc2c1c(=O)n(C)c(=O)n2C",  # caffeine: none
        "FC(F)(F)c1ccccc1CC#N",
        "CC(C)(C)CCN",
        "c1ccccc1-c1ccccc1",
    ],
)
def test_rotatable_torsions_match_rdkit_strict_count(smiles):
    """Independent route: RDKit's C++ CalcNumRotatableBonds(Strict), with and without H."""
    mol = Chem.MolFromSmiles(smiles)
    want = rdMolDescriptors.CalcNumRotatableBonds(mol, rdMolDescriptors.NumRotatableBondsOptions.Strict)
    assert len(obs.rotatable_torsions(mol, polar_hydrogens=False)) == want
    assert len(obs.rotatable_torsions(Chem.AddHs(mol), polar_hydrogens=False)) == want
    for q in obs.rotatable_torsions(Chem.AddHs(mol)):
        m = Chem.AddHs(mol)
        assert all(m.GetBondBetweenAtoms(a, b) is not None for a, b in zip(q[:-1], q[1:]))


# ---------------------------------------------------------------------------------------
# RDF
# ---------------------------------------------------------------------------------------
def test_rdf_of_uniform_random_points_is_one():
    """Ideal gas: g(r) = 1 for all r. Statistical tolerance: per-bin counts are ~Poisson,
    so each bin's relative error is 1/sqrt(expected count); allow 5 sigma per bin and
    2% on the mean over bins beyond 0.3 nm."""
    rng = np.random.default_rng(42)
    n_frames, n_atoms, length = 20, 400, 3.0
    traj = rng.uniform(0.0, length, size=(n_frames, n_atoms, 3))
    boxes = np.broadcast_to(np.eye(3) * length, (n_frames, 3, 3))
    a = np.arange(0, 100)
    b = np.arange(50, 400)  # overlapping groups: self pairs must be excluded
    r, g = obs.radial_distribution(traj, boxes, a, b, r_max_nm=1.4, n_bins=28)
    assert r.shape == g.shape == (28,)
    shell = 4 / 3 * np.pi * ((r + 0.025) ** 3 - (r - 0.025) ** 3)
    expected = n_frames * (a.size * b.size - 50) * shell / length**3
    sigma = 1 / np.sqrt(expected)
    far = r > 0.3
    assert np.all(np.abs(g[far] - 1) < 5 * sigma[far])
    assert g[far].mean() == pytest.approx(1.0, abs=0.02)


def test_rdf_triclinic_uniform_points_is_one():
    """General triclinic box (OpenMM reduced form): uniform points inside the cell."""
    rng = np.random.default_rng(7)
    box = np.array([[3.0, 0.0, 0.0], [1.0, 2.8, 0.0], [-1.2, 0.9, 2.9]])
    n_frames, n_atoms = 20, 400
    frac = rng.uniform(size=(n_frames, n_atoms, 3))
    traj = frac @ box
    heights = obs.box_heights(box)
    r_max = 0.49 * heights.min()
    r, g = obs.radial_distribution(traj, box, range(n_atoms), range(n_atoms), r_max, n_bins=20)
    far = r > 0.4
    assert g[far].mean() == pytest.approx(1.0, abs=0.02)
    with pytest.raises(ValueError, match="half the shortest box height"):
        obs.radial_distribution(traj, box, range(10), range(10), 0.51 * heights.min(), 10)


def test_rdf_pair_at_known_distance_across_boundary():
    box = np.eye(3) * 2.0
    x = np.array([[[0.05, 1.0, 1.0], [1.73, 1.0, 1.0]]])  # 0.32 nm through the x face
    r, g = obs.radial_distribution(x, box, [0], [1], r_max_nm=0.5, n_bins=10)
    assert np.flatnonzero(g).tolist() == [6]  # bin 0.30-0.35 nm


# ---------------------------------------------------------------------------------------
# hydrogen bonds
# ---------------------------------------------------------------------------------------
def _water_dimer(r_oo=0.28, h_angle_deg=0.0, shift=(1.0, 1.0, 1.0)):
    """Donor water O0-H1 (H1 tilted by h_angle from the O...O axis) and H2; acceptor O3 at
    r_oo along +x with H4, H5 pointing away."""
    roh = 0.09572
    t = np.radians(h_angle_deg)
    o0 = np.zeros(3)
    h1 = roh * np.array([np.cos(t), np.sin(t), 0.0])
    h2 = roh * np.array([np.cos(np.radians(104.52)), np.sin(np.radians(104.52)), 0.0])
    o3 = np.array([r_oo, 0.0, 0.0])
    h4 = o3 + roh * np.array([0.6, 0.0, 0.8])
    h5 = o3 + roh * np.array([0.6, 0.0, -0.8])
    return np.array([o0, h1, h2, o3, h4, h5]) + np.asarray(shift)


DONORS = [(0, 1), (0, 2), (3, 4), (3, 5)]
ACCEPTORS = [0, 3]


def test_hbond_linear_dimer_is_one():
    assert obs.hydrogen_bond_count(_water_dimer(), np.eye(3) * 3.0, DONORS, ACCEPTORS) == 1
    assert obs.hydrogen_bond_count(_water_dimer(), None, DONORS, ACCEPTORS) == 1


def test_hbond_broken_by_angle_or_distance():
    box = np.eye(3) * 3.0
    assert obs.hydrogen_bond_count(_water_dimer(h_angle_deg=90.0), box, DONORS, ACCEPTORS) == 0
    assert obs.hydrogen_bond_count(_water_dimer(h_angle_deg=25.0), box, DONORS, ACCEPTORS) == 1
    assert obs.hydrogen_bond_count(_water_dimer(h_angle_deg=35.0), box, DONORS, ACCEPTORS) == 0
    assert obs.hydrogen_bond_count(_water_dimer(r_oo=0.40), box, DONORS, ACCEPTORS) == 0


def test_hbond_across_periodic_boundary_and_vectorised():
    box = np.eye(3) * 3.0
    across = _water_dimer(shift=(2.85, 1.0, 1.0)) % 3.0  # acceptor wrapped to x ~ 0.13
    frames = np.stack([_water_dimer(), across, _water_dimer(r_oo=0.4), _water_dimer(h_angle_deg=90)])
    counts = obs.hydrogen_bond_counts(frames, np.broadcast_to(box, (4, 3, 3)), DONORS, ACCEPTORS)
    assert counts.tolist() == [1, 1, 0, 0]
    # without the box the wrapped frame has no H-bond
    assert obs.hydrogen_bond_count(across, None, DONORS, ACCEPTORS) == 0


def test_polar_atom_helpers():
    apap = Chem.AddHs(Chem.MolFromSmiles("CC(=O)Nc1ccc(O)cc1"))
    donors, acceptors = obs.ligand_polar_atoms(apap, offset=100)
    symbols = {i - 100: apap.GetAtomWithIdx(i - 100).GetSymbol() for i in acceptors}
    assert sorted(symbols.values()) == ["N", "O", "O"]
    assert len(donors) == 2  # N-H and O-H
    for d, h in donors:
        assert apap.GetAtomWithIdx(h - 100).GetAtomicNum() == 1
        assert apap.GetBondBetweenAtoms(d - 100, h - 100) is not None

    from openmm.app import Element, Topology

    top = Topology()
    chain = top.addChain()
    lig = top.addResidue("LIG", chain)
    top.addAtom("C1", Element.getBySymbol("C"), lig)
    for name in ("HOH", "WAT"):
        res = top.addResidue(name, chain)
        top.addAtom("O", Element.getBySymbol("O"), res)
        top.addAtom("H1", Element.getBySymbol("H"), res)
        top.addAtom("H2", Element.getBySymbol("H"), res)
    oxygens, wdonors = obs.water_atoms(top)
    assert oxygens == [1, 4]
    assert wdonors == [(1, 2), (1, 3), (4, 5), (4, 6)]


# ---------------------------------------------------------------------------------------
# RMSD
# ---------------------------------------------------------------------------------------
def test_rmsd_rigid_motion_is_zero_and_known_displacement():
    rng = np.random.default_rng(3)
    ref = rng.normal(scale=0.3, size=(12, 3))
    rotated = ref @ _rotation([1, 2, -0.5], 1.1).T + np.array([0.7, -0.2, 1.5])
    # a rigidly rotated and translated copy superposes exactly
    traj = np.stack([ref, rotated])
    rmsd = obs.rmsd_from_start(traj)
    assert rmsd[0] == pytest.approx(0.0, abs=1e-12)
    assert rmsd[1] == pytest.approx(0.0, abs=1e-7)

    # known displacement: a square of 4 equal masses expanded uniformly by d per atom
    # (radially): no rotation/translation reduces it, so RMSD = d exactly.
    square = np.array([[1, 0, 0], [0, 1, 0], [-1, 0, 0], [0, -1, 0]], float) * 0.2
    d = 0.03
    expanded = square * (1 + d / 0.2)
    moved = expanded @ _rotation([0, 0, 1], 0.4).T + 0.5
    assert obs.rmsd_from_start(np.stack([square, moved]))[1] == pytest.approx(d, abs=1e-10)
    # mass weighting: only the weighted atoms count; expanding two opposite atoms of the
    # square by d gives the weighted RMSD sqrt(w d^2 * 2 / sum w)
    two = square.copy()
    two[[0, 2]] *= 1 + d / 0.2
    masses = np.array([1.0, 3.0, 1.0, 3.0])
    want = np.sqrt(2 * 1.0 * d**2 / masses.sum())
    assert obs.rmsd_from_start(np.stack([square, two]), masses=masses)[1] == pytest.approx(
        want, abs=1e-10
    )


def test_rmsd_of_wrapped_ligand_uses_whole_molecule():
    rng = np.random.default_rng(5)
    ref = rng.normal(scale=0.15, size=(8, 3)) + 1.0
    box = np.eye(3) * 2.0
    moved = ref + np.array([0.95, 0.0, 0.0])  # straddles the x = 2 face
    wrapped = moved % 2.0
    traj = np.stack([ref, wrapped])
    boxes = np.broadcast_to(box, (2, 3, 3))
    assert obs.rmsd_from_start(traj, boxes=boxes)[1] == pytest.approx(0.0, abs=1e-10)
    assert obs.rmsd_from_start(traj)[1] > 0.1  # without the box the split molecule is wrong
    # a subset of atoms
    assert obs.rmsd_from_start(traj, atoms=[0, 2, 4], boxes=boxes)[1] == pytest.approx(0, abs=1e-10)


def test_kabsch_reflection_not_allowed():
    """A mirror image is not a rigid motion: its RMSD must stay positive."""
    pts = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1]], float) * 0.1
    mirror = pts * np.array([1, 1, -1])
    assert obs.kabsch_rmsd(mirror, pts)[0] > 0.01
