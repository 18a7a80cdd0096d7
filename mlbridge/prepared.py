"""Prepared systems: AMBER prmtop/inpcrd, GROMACS top/gro, CHARMM psf/crd + parameters, OpenMM
System XML + PDB -> :class:`~mlbridge.solvate.SolvatedSystem`, with the region picked by residue
name or atom indices.

The classical System is created with the same options as a system mlbridge builds (PME,
0.9 nm, X-H constraints, rigid water) except for the OpenMM XML route, where the System is used
as given.
"""
from __future__ import annotations

import os
from pathlib import Path
from typing import Optional, Sequence, Union

import numpy as np
import openmm
import openmm.app as app
import openmm.unit as unit

from .errors import InputFileNotFoundError, PreparedSystemError
from .solvate import SolvatedSystem, system_options

PREPARED_SUFFIXES = (".prmtop", ".parm7", ".top", ".psf", ".xml")


def _file(path, what: str) -> Path:
    if path is None:
        raise PreparedSystemError(f"{what} is required for this prepared system (CLI: --coordinates FILE).")
    p = Path(path)
    if not p.is_file():
        raise InputFileNotFoundError(f"{what} {str(p)!r} does not exist; check the path.")
    return p


def parse_atom_ranges(text: Union[str, Sequence[int]]) -> tuple:
    """'0-19,25' -> (0, ..., 19, 25); a sequence of ints passes through."""
    if not isinstance(text, str):
        return tuple(int(i) for i in text)
    out = []
    for part in text.split(","):
        part = part.strip()
        if not part:
            continue
        try:
            if "-" in part:
                a, b = part.split("-", 1)
                out.extend(range(int(a), int(b) + 1))
            else:
                out.append(int(part))
        except ValueError:
            raise PreparedSystemError(f"cannot read atom indices {text!r}; write them like '0-19,25'.") from None
    return tuple(out)


def select_region(topology: app.Topology, *, residue: Optional[str] = None,
                  atoms: Union[None, str, Sequence[int]] = None) -> tuple:
    """Region atom indices by residue name (all residues of that name must be one molecule) or indices."""
    n = topology.getNumAtoms()
    if (residue is None) == (atoms is None):
        raise PreparedSystemError("pick the region by residue name or by atom indices (exactly one of them).")
    if residue is not None:
        idx = tuple(a.index for a in topology.atoms() if a.residue.name == residue)
        if not idx:
            names = sorted({r.name for r in topology.residues()})
            raise PreparedSystemError(
                f"no residue named {residue!r} in this system; residue names present: {', '.join(names)}."
            )
        return idx
    idx = parse_atom_ranges(atoms)
    bad = [i for i in idx if not 0 <= i < n]
    if bad or not idx:
        raise PreparedSystemError(f"region atom indices {bad[:5] or idx} are outside 0..{n - 1}.")
    if len(set(idx)) != len(idx):
        raise PreparedSystemError("region atom indices repeat; give each atom once.")
    return tuple(sorted(idx))


def load_prepared(path: Union[str, os.PathLike], *, coordinates=None, params: Sequence = (),
                  region_residue: Optional[str] = None, region_atoms=None, cutoff: float = 0.9,
                  gromacs_include_dir: Optional[str] = None) -> SolvatedSystem:
    """Read a prepared system; see the module docstring for the formats."""
    p = Path(path)
    if not p.is_file():
        raise InputFileNotFoundError(f"prepared system file {str(p)!r} does not exist; check the path.")
    suffix = p.suffix.lower()
    opts = system_options(cutoff)
    try:
        if suffix in (".prmtop", ".parm7"):
            crd = app.AmberInpcrdFile(str(_file(coordinates, "AMBER coordinates (.inpcrd/.rst7)")))
            top = app.AmberPrmtopFile(str(p), periodicBoxVectors=crd.boxVectors)
            system, topology, pos, box = top.createSystem(**opts), top.topology, crd.positions, crd.boxVectors
        elif suffix == ".top":
            gro = app.GromacsGroFile(str(_file(coordinates, "GROMACS coordinates (.gro)")))
            top = app.GromacsTopFile(str(p), periodicBoxVectors=gro.getPeriodicBoxVectors(),
                                     includeDir=gromacs_include_dir)
            system, topology, pos, box = top.createSystem(**opts), top.topology, gro.positions, gro.getPeriodicBoxVectors()
        elif suffix == ".psf":
            if not params:
                raise PreparedSystemError("a CHARMM .psf needs its parameter files (CLI: --params par.prm top.rtf ...).")
            psf = app.CharmmPsfFile(str(p))
            cpath = _file(coordinates, "CHARMM coordinates (.crd or .pdb)")
            crd = app.CharmmCrdFile(str(cpath)) if cpath.suffix.lower() == ".crd" else app.PDBFile(str(cpath))
            prm = app.CharmmParameterSet(*[str(_file(f, "CHARMM parameter file")) for f in params])
            pos = crd.positions
            xyz = np.array(pos.value_in_unit(unit.nanometer))
            L = np.ptp(xyz, axis=0)
            psf.setBox(*(float(v) for v in L) * unit.nanometer)
            system, topology, box = psf.createSystem(prm, **opts), psf.topology, None
        elif suffix == ".xml":
            pdb = app.PDBFile(str(_file(coordinates, "PDB coordinates of the OpenMM System")))
            system = openmm.XmlSerializer.deserialize(p.read_text())
            topology, pos = pdb.topology, pdb.positions
            box = system.getDefaultPeriodicBoxVectors() if system.usesPeriodicBoundaryConditions() else None
            if system.getNumParticles() != topology.getNumAtoms():
                raise PreparedSystemError(
                    f"the System has {system.getNumParticles()} particles but the PDB {topology.getNumAtoms()} atoms; "
                    "give the PDB written together with this System."
                )
        else:
            raise PreparedSystemError(f"unknown prepared-system file type {suffix!r}; use one of {PREPARED_SUFFIXES}.")
    except (PreparedSystemError, InputFileNotFoundError):
        raise
    except Exception as e:  # library parse errors: name the file and the format
        raise PreparedSystemError(f"could not read prepared system {p.name!r} ({suffix} format): {e}") from e
    region = select_region(topology, residue=region_residue, atoms=region_atoms)
    nb = next((f for f in system.getForces() if isinstance(f, openmm.NonbondedForce)), None)
    if nb is None:
        raise PreparedSystemError("the prepared system has no NonbondedForce; mlbridge needs fixed-charge electrostatics.")
    charges = np.array([nb.getParticleParameters(i)[0].value_in_unit(unit.elementary_charge) for i in region])
    net = int(round(charges.sum()))
    if abs(charges.sum() - net) > 1e-3:
        raise PreparedSystemError(
            f"the region's charges sum to {charges.sum():.4f} e, not an integer; the selection cuts through a molecule."
        )
    if box is not None:
        system.setDefaultPeriodicBoxVectors(*box)
        topology.setPeriodicBoxVectors(box)
    positions = np.array(unit.Quantity(pos).value_in_unit(unit.nanometer)).reshape(-1, 3)
    solv = SolvatedSystem(system=system, topology=topology, positions=positions, region=region,
                          region_charges=charges, net_charge=net, ligand=None)
    solv.metadata.update({
        "source": f"prepared system {p.name}", "region_selection": region_residue or str(region_atoms),
        "ligand_net_charge_e": net, "n_waters": solv.water_count(),
        "box_vectors_nm": solv.box_vectors_nm().round(6).tolist() if box is not None else None,
        "constraints": "HBonds, rigid water" if suffix != ".xml" else "as in the given System",
        "nonbonded": f"PME, cutoff {cutoff} nm" if suffix != ".xml" else "as in the given System",
        "built_for_timestep_fs": 2.0 if suffix != ".xml" else None,
    })
    return solv
