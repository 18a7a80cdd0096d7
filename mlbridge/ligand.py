"""Ligand input: SMILES, SDF/MOL, MOL2, or PDB plus a SMILES template -> one :class:`Ligand`.

Every route ends in an RDKit ``Mol`` with explicit hydrogens and one 3D conformer, checked the
same way (one fragment, hydrogens present, real 3D coordinates). Bad input raises
:class:`~mlbridge.errors.LigandInputError` (or :class:`~mlbridge.errors.InputFileNotFoundError`)
with a message that names the problem and the fix.
"""
from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path
from typing import Optional, Union

import numpy as np
from rdkit import Chem, RDLogger
from rdkit.Chem import AllChem

from .errors import InputFileNotFoundError, LigandInputError

#: seed of the ETKDG conformer embedding (fixed: the same SMILES gives the same start structure)
EMBED_SEED = 20261201


@dataclass(frozen=True)
class Ligand:
    """A small molecule ready for parametrization.

    Attributes
    ----------
    mol : rdkit.Chem.Mol, explicit hydrogens, one 3D conformer (angstrom, RDKit's unit)
    name : str, a short label used for residue names and file names
    source : str, where it came from ("smiles", a file path)
    """

    mol: Chem.Mol
    name: str = "LIG"
    source: str = "smiles"

    @property
    def net_charge(self) -> int:
        """Net charge in e, the sum of formal charges."""
        return int(Chem.GetFormalCharge(self.mol))

    @property
    def elements(self) -> tuple:
        """Element symbols in atom order."""
        return tuple(a.GetSymbol() for a in self.mol.GetAtoms())

    @property
    def n_atoms(self) -> int:
        return self.mol.GetNumAtoms()

    @property
    def positions_nm(self) -> np.ndarray:
        """(n_atoms, 3) coordinates in nm."""
        return np.asarray(self.mol.GetConformer().GetPositions(), dtype=float) * 0.1

    @property
    def smiles(self) -> str:
        """Canonical isomeric SMILES (without explicit hydrogens): the parameter cache key."""
        return Chem.MolToSmiles(Chem.RemoveHs(self.mol), isomericSmiles=True)

    @property
    def bonds(self) -> tuple:
        """Bonds as (i, j) atom-index pairs."""
        return tuple((b.GetBeginAtomIdx(), b.GetEndAtomIdx()) for b in self.mol.GetBonds())


def _quiet_rdkit():
    RDLogger.DisableLog("rdApp.*")


def _check_file(path: Union[str, os.PathLike]) -> Path:
    p = Path(path)
    if not p.is_file():
        raise InputFileNotFoundError(
            f"ligand file {str(p)!r} does not exist; check the path (working directory: {os.getcwd()})"
        )
    return p


def _check_single_fragment(mol: Chem.Mol, what: str) -> None:
    frags = Chem.GetMolFrags(mol, asMols=True, sanitizeFrags=False)
    if len(frags) > 1:
        desc = ", ".join(
            f"{i}: {Chem.MolToSmiles(Chem.RemoveHs(f, sanitize=False))} ({f.GetNumAtoms()} atoms)"
            for i, f in enumerate(frags)
        )
        raise LigandInputError(
            f"{what} has {len(frags)} disconnected fragments ({desc}); this looks like a salt or a "
            "mixture. Keep one fragment, e.g. pass keep_fragment=<index> or remove the counter-ion "
            "(the solvation step adds neutralising Na+/Cl- itself)."
        )


def _check_hydrogens(mol: Chem.Mol, what: str) -> None:
    missing = [a.GetIdx() for a in mol.GetAtoms() if a.GetTotalNumHs(includeNeighbors=False) > 0]
    if missing:
        raise LigandInputError(
            f"{what} has implicit hydrogens on atoms {missing[:10]}{'...' if len(missing) > 10 else ''}: "
            "a 3D structure needs every hydrogen as an explicit atom. Add hydrogens with coordinates "
            "(e.g. `obabel -h`, or RDKit Chem.AddHs(mol, addCoords=True)) or start from SMILES."
        )


def _check_3d(mol: Chem.Mol, what: str) -> None:
    if mol.GetNumConformers() == 0:
        raise LigandInputError(f"{what} has no coordinates; give a 3D structure or start from SMILES.")
    xyz = mol.GetConformer().GetPositions()
    if mol.GetNumAtoms() > 3 and np.ptp(xyz[:, 2]) < 1e-4:
        raise LigandInputError(
            f"{what} has 2D coordinates (all z = {xyz[0, 2]:.3f}); a 3D structure is needed. "
            "Export 3D coordinates from your editor, or give the SMILES and let mlbridge embed a conformer."
        )


def _keep_fragment(mol: Chem.Mol, keep_fragment: Optional[int], what: str) -> Chem.Mol:
    if keep_fragment is None:
        return mol
    frags = Chem.GetMolFrags(mol, asMols=True)
    if not 0 <= keep_fragment < len(frags):
        raise LigandInputError(
            f"keep_fragment={keep_fragment} but {what} has {len(frags)} fragment(s) (0..{len(frags) - 1})."
        )
    return frags[keep_fragment]


def _finish(mol: Chem.Mol, name: str, source: str, what: str) -> Ligand:
    _check_single_fragment(mol, what)
    _check_hydrogens(mol, what)
    _check_3d(mol, what)
    if not name or len(name) > 3 or not name.isalnum():
        raise LigandInputError(
            f"ligand name {name!r} must be 1-3 letters/digits (it becomes the PDB residue name), e.g. 'LIG'."
        )
    return Ligand(mol=Chem.Mol(mol), name=name.upper(), source=source)


def from_smiles(smiles: str, *, name: str = "LIG", keep_fragment: Optional[int] = None,
                seed: int = EMBED_SEED) -> Ligand:
    """Build a ligand from SMILES: add hydrogens, embed with seeded ETKDG, relax briefly with MMFF.

    ETKDG: Riniker & Landrum, J. Chem. Inf. Model. 55, 2562 (2015). MMFF94: Halgren, J. Comput.
    Chem. 17, 490 (1996). The relaxation (200 iterations at most) only removes embedding strain.
    """
    _quiet_rdkit()
    if not isinstance(smiles, str) or not smiles.strip():
        raise LigandInputError("empty SMILES; give e.g. 'CC(=O)Nc1ccc(O)cc1'.")
    mol = Chem.MolFromSmiles(smiles.strip())
    if mol is None:
        raise LigandInputError(
            f"could not parse SMILES {smiles!r}: check brackets, ring-closure digits and aromatic "
            "atoms (RDKit's parser rejected it)."
        )
    what = f"SMILES {smiles!r}"
    if keep_fragment is None:
        _check_single_fragment(mol, what)
    mol = _keep_fragment(mol, keep_fragment, what)
    mol = Chem.AddHs(mol)
    params = AllChem.ETKDGv3()
    params.randomSeed = int(seed)
    if AllChem.EmbedMolecule(mol, params) != 0:
        params.useRandomCoords = True
        if AllChem.EmbedMolecule(mol, params) != 0:
            raise LigandInputError(
                f"RDKit could not embed a 3D conformer for {smiles!r}; check the stereochemistry, "
                "or give a 3D SDF/MOL2 file instead."
            )
    if AllChem.MMFFHasAllMoleculeParams(mol):
        AllChem.MMFFOptimizeMolecule(mol, maxIters=200)
    return _finish(mol, name, "smiles", what)


def from_file(path: Union[str, os.PathLike], *, name: Optional[str] = None,
              keep_fragment: Optional[int] = None) -> Ligand:
    """Read a ligand from an SDF/MOL or MOL2 file with 3D coordinates and explicit hydrogens."""
    _quiet_rdkit()
    p = _check_file(path)
    suffix = p.suffix.lower()
    if suffix in (".sdf", ".mol", ".sd"):
        supplier = Chem.SDMolSupplier(str(p), removeHs=False, sanitize=True)
        mol = next(iter(supplier), None) if len(supplier) else None
    elif suffix == ".mol2":
        mol = Chem.MolFromMol2File(str(p), removeHs=False, sanitize=True)
    else:
        raise LigandInputError(
            f"unknown ligand file type {suffix!r} for {str(p)!r}; use .sdf, .mol or .mol2 "
            "(or .pdb together with a SMILES template)."
        )
    if mol is None:
        raise LigandInputError(
            f"RDKit could not read {str(p)!r}: the file is empty or not valid {suffix[1:].upper()} "
            "(check valences and bond orders)."
        )
    what = f"file {p.name!r}"
    if keep_fragment is None:
        _check_single_fragment(mol, what)
    mol = _keep_fragment(mol, keep_fragment, what)
    label = name or (mol.GetProp("_Name")[:3] if mol.HasProp("_Name") and mol.GetProp("_Name")[:3].isalnum() else "LIG")
    return _finish(mol, label, str(p), what)


def from_pdb(path: Union[str, os.PathLike], smiles: str, *, name: Optional[str] = None) -> Ligand:
    """Read a ligand from PDB coordinates and take its bond orders from a SMILES template.

    PDB files carry no bond orders; RDKit's ``AssignBondOrdersFromTemplate`` maps the template
    onto the PDB connectivity. The PDB must contain every hydrogen.
    """
    _quiet_rdkit()
    p = _check_file(path)
    pdb = Chem.MolFromPDBFile(str(p), removeHs=False, sanitize=False, proximityBonding=True)
    if pdb is None or pdb.GetNumAtoms() == 0:
        raise LigandInputError(f"RDKit could not read any atoms from PDB file {str(p)!r}.")
    template = Chem.MolFromSmiles(smiles) if isinstance(smiles, str) else None
    if template is None:
        raise LigandInputError(f"could not parse the template SMILES {smiles!r} given with {p.name!r}.")
    template_h = Chem.AddHs(template)
    n_heavy_pdb = sum(1 for a in pdb.GetAtoms() if a.GetAtomicNum() > 1)
    n_h_pdb = pdb.GetNumAtoms() - n_heavy_pdb
    if n_heavy_pdb == template.GetNumAtoms() and n_h_pdb == 0 and template_h.GetNumAtoms() > template.GetNumAtoms():
        raise LigandInputError(
            f"PDB file {p.name!r} has no hydrogens but the template {smiles!r} needs "
            f"{template_h.GetNumAtoms() - template.GetNumAtoms()}; protonate the structure "
            "(e.g. `reduce` or `pdb4amber --reduce`) and write all hydrogens to the PDB."
        )
    if pdb.GetNumAtoms() != template_h.GetNumAtoms():
        pdb_formula = _formula(pdb)
        raise LigandInputError(
            f"PDB file {p.name!r} has {pdb.GetNumAtoms()} atoms ({pdb_formula}) but the template "
            f"{smiles!r} with hydrogens has {template_h.GetNumAtoms()} ({_formula(template_h)}); "
            "give the SMILES of exactly the molecule in the PDB, protonation state included."
        )
    try:
        mol = AllChem.AssignBondOrdersFromTemplate(template_h, pdb)
        Chem.SanitizeMol(mol)
    except (ValueError, RuntimeError) as e:
        raise LigandInputError(
            f"the atoms of PDB file {p.name!r} do not match the template {smiles!r} "
            f"(RDKit: {e}); check that the SMILES describes this molecule and that the PDB "
            "bonds (CONECT records or geometry) are sensible."
        ) from e
    label = name
    if label is None:
        info = mol.GetAtomWithIdx(0).GetPDBResidueInfo()
        label = info.GetResidueName().strip() if info is not None else "LIG"
    return _finish(mol, label or "LIG", str(p), f"PDB file {p.name!r}")


def _formula(mol: Chem.Mol) -> str:
    counts: dict = {}
    for a in mol.GetAtoms():
        counts[a.GetSymbol()] = counts.get(a.GetSymbol(), 0) + 1
    return "".join(f"{k}{v}" for k, v in sorted(counts.items()))


def load_ligand(spec: Union[str, os.PathLike], *, smiles: Optional[str] = None,
                name: Optional[str] = None, keep_fragment: Optional[int] = None) -> Ligand:
    """One entry point: a path (SDF/MOL/MOL2, or PDB with ``smiles=``) or a SMILES string.

    A string that names an existing file, or ends in a known extension, is read as a file.
    """
    s = str(spec)
    looks_like_file = Path(s).suffix.lower() in (".sdf", ".sd", ".mol", ".mol2", ".pdb") or os.path.sep in s
    if looks_like_file or Path(s).is_file():
        if Path(s).suffix.lower() == ".pdb":
            if smiles is None:
                raise LigandInputError(
                    f"PDB file {s!r} needs a SMILES template for its bond orders: pass smiles='...' "
                    "(CLI: --smiles '...')."
                )
            return from_pdb(s, smiles, name=name)
        return from_file(s, name=name, keep_fragment=keep_fragment)
    return from_smiles(s, name=name or "LIG", keep_fragment=keep_fragment)
