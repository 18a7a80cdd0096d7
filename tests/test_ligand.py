"""Ligand input routes and their errors."""
import numpy as np
import pytest
from rdkit import Chem
from rdkit.Chem import AllChem

from mlbridge.errors import InputFileNotFoundError, LigandInputError
from mlbridge.ligand import from_file, from_pdb, from_smiles, load_ligand

from conftest import DEMO_SMILES, SYSTEMS


def test_smiles_gives_3d_with_hydrogens_and_charge():
    lig = from_smiles(DEMO_SMILES)
    assert lig.n_atoms == 20 and lig.elements.count("H") == 9
    assert np.ptp(lig.positions_nm[:, 2]) > 0.05  # real 3D, nm
    assert lig.net_charge == 0
    assert from_smiles("C[NH3+]").net_charge == 1
    # seeded: the same SMILES gives the same start structure
    assert np.allclose(from_smiles(DEMO_SMILES).positions_nm, lig.positions_nm)


def test_sdf_mol2_and_pdb_routes_agree(tmp_path):
    lig = from_smiles(DEMO_SMILES)
    sdf = tmp_path / "l.sdf"
    Chem.MolToMolFile(lig.mol, str(sdf))
    assert from_file(sdf).smiles == lig.smiles
    pdb = tmp_path / "l.pdb"
    Chem.MolToPDBFile(lig.mol, str(pdb))
    from_p = from_pdb(pdb, DEMO_SMILES)
    assert from_p.smiles == lig.smiles and np.allclose(from_p.positions_nm, lig.positions_nm, atol=1e-3)
    assert load_ligand(str(sdf)).smiles == lig.smiles
    assert load_ligand(DEMO_SMILES).smiles == lig.smiles
    m2 = SYSTEMS / "test" / "ethanol.mol2"
    assert from_file(m2).elements.count("C") == 2


def test_unparsable_smiles():
    with pytest.raises(LigandInputError, match="could not parse SMILES"):
        from_smiles("C1CC(")


def test_file_not_found():
    with pytest.raises(InputFileNotFoundError, match="does not exist"):
        from_file("no/such/ligand.sdf")


def test_2d_coordinates(tmp_path):
    m = Chem.AddHs(Chem.MolFromSmiles(DEMO_SMILES))
    AllChem.Compute2DCoords(m)
    p = tmp_path / "flat.sdf"
    Chem.MolToMolFile(m, str(p))
    with pytest.raises(LigandInputError, match="2D coordinates"):
        from_file(p)


def test_missing_hydrogens(tmp_path):
    lig = from_smiles(DEMO_SMILES)
    p = tmp_path / "noh.sdf"
    Chem.MolToMolFile(Chem.RemoveHs(lig.mol), str(p))
    with pytest.raises(LigandInputError, match="implicit hydrogens"):
        from_file(p)


def test_salt_names_fragments_and_keep_fragment():
    with pytest.raises(LigandInputError, match=r"2 disconnected fragments.*keep_fragment"):
        from_smiles("C[NH3+].[Cl-]")
    assert from_smiles("C[NH3+].[Cl-]", keep_fragment=0).net_charge == 1


def test_pdb_atoms_not_matching_template(tmp_path):
    lig = from_smiles(DEMO_SMILES)
    p = tmp_path / "l.pdb"
    Chem.MolToPDBFile(lig.mol, str(p))
    with pytest.raises(LigandInputError, match="atoms .* but the template"):
        from_pdb(p, "CC(=O)Nc1ccc(N)cc1")  # one more H than the PDB has
    with pytest.raises(LigandInputError, match="do not match the template"):
        from_pdb(p, "CC(=O)Oc1ccc(N)cc1")  # same atom count, other molecule
    noh = tmp_path / "noh.pdb"
    Chem.MolToPDBFile(Chem.RemoveHs(lig.mol), str(noh))
    with pytest.raises(LigandInputError, match="no hydrogens"):
        from_pdb(noh, DEMO_SMILES)
    with pytest.raises(LigandInputError, match="needs a SMILES template"):
        load_ligand(str(p))
