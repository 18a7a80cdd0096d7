"""build(...) -> BuiltSystem: a solvated system with one treatment applied; save/load atomically.

Data flow: input -> Ligand -> parameters -> SolvatedSystem -> region terms -> BuiltSystem.
"""
from __future__ import annotations

import json
import os
import shutil
import tempfile
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Optional, Union

import numpy as np
import openmm
import openmm.app as app
import openmm.unit as unit

from . import __version__
from .errors import OptionError, TreatmentError
from .ligand import Ligand, load_ligand
from .region import bond_tree, region_bonds_from_topology, remove_region_internal, zero_region_charges
from .regionforce import FIRST_TERM_GROUP, RegionTermForce, add_region_forces
from .solvate import SolvatedSystem, solvate
from .terms.base import RegionInfo, build_term
from .treatments import Treatment, get_treatment

ML_MODELS = ("ani1x", "ani1ccx", "ani2x")


@dataclass
class BuiltSystem:
    """What a user runs: an OpenMM System + Topology + positions, the region and how it is treated.

    Attributes
    ----------
    system : openmm.System (region terms as PythonForces, one force group each)
    topology : openmm.app.Topology
    positions : (N, 3) ndarray, nm
    region : tuple of int, region atom indices
    treatment : str
    metadata : dict (build options, force groups, term descriptions, constraints, timestep, ...)
    solvated : SolvatedSystem or None, the classical system it came from (not saved)
    """

    system: openmm.System
    topology: app.Topology
    positions: np.ndarray
    region: tuple
    treatment: str
    metadata: dict = field(default_factory=dict)
    solvated: Optional[SolvatedSystem] = None

    @property
    def force_groups(self) -> dict:
        """{group: label} of the energy terms ("classical" is group 0)."""
        return {int(k): v for k, v in self.metadata.get("force_groups", {"0": "classical"}).items()}

    def save(self, folder: Union[str, os.PathLike]) -> Path:
        """Write ``system.xml``, ``start.pdb`` (topology, for viewers), ``start-positions.npy``
        (full-precision positions, nm) and ``metadata.json`` into ``folder`` atomically.

        Everything is written into a temporary sibling folder first and renamed into place, so a
        failure never leaves a half-written folder.
        """
        with atomic_folder(folder) as tmp:
            (tmp / "system.xml").write_text(openmm.XmlSerializer.serialize(self.system))
            np.save(tmp / "start-positions.npy", np.asarray(self.positions, dtype=np.float64))
            with open(tmp / "start.pdb", "w") as fh:
                app.PDBFile.writeFile(self.topology, self.positions * unit.nanometer, fh, keepIds=True)
            meta = dict(self.metadata, region=list(self.region), treatment=self.treatment)
            (tmp / "metadata.json").write_text(json.dumps(meta, indent=2, default=_jsonable))
        return Path(folder)

    @classmethod
    def load(cls, folder: Union[str, os.PathLike]) -> "BuiltSystem":
        """Read a folder written by :meth:`save`."""
        folder = Path(folder)
        meta = json.loads((folder / "metadata.json").read_text())
        system = openmm.XmlSerializer.deserialize((folder / "system.xml").read_text())
        pdb = app.PDBFile(str(folder / "start.pdb"))
        npy = folder / "start-positions.npy"
        pos = (np.load(npy) if npy.is_file()
               else np.array(pdb.getPositions(asNumpy=True).value_in_unit(unit.nanometer)))
        pdb.topology.setPeriodicBoxVectors(system.getDefaultPeriodicBoxVectors())
        return cls(system=system, topology=pdb.topology, positions=pos, region=tuple(meta["region"]),
                   treatment=meta["treatment"], metadata=meta)


def _jsonable(o):
    if isinstance(o, np.ndarray):
        return o.tolist()
    if isinstance(o, (np.floating, np.integer)):
        return o.item()
    if isinstance(o, Path):
        return str(o)
    raise TypeError(f"cannot write {type(o).__name__} to JSON")


@contextmanager
def atomic_folder(folder: Union[str, os.PathLike]):
    """Yield a temporary sibling folder to fill; on success it replaces ``folder`` (two renames),
    on any error it is removed and ``folder`` is left as it was."""
    folder = Path(folder)
    folder.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{folder.name}.tmp-", dir=folder.parent))
    try:
        yield tmp
        replace_folder(tmp, folder)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise


def replace_folder(new: Path, target: Path) -> None:
    """Move folder ``new`` to ``target``, replacing an old ``target`` with two renames."""
    if target.exists():
        old = target.with_name(f".{target.name}.old-{os.getpid()}")
        os.replace(target, old)
        os.replace(new, target)
        shutil.rmtree(old, ignore_errors=True)
    else:
        os.replace(new, target)


def write_json_atomic(path: Path, data) -> None:
    """Write JSON to ``path`` via a temporary file and a rename."""
    path = Path(path)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", dir=path.parent)
    with os.fdopen(fd, "w") as fh:
        json.dump(data, fh, indent=2, default=_jsonable)
    os.replace(tmp, path)


def region_info(solv: SolvatedSystem, with_environment: bool) -> RegionInfo:
    """Describe the region of ``solv`` for the region terms."""
    atoms = list(solv.topology.atoms())
    region = list(solv.region)
    nb = next(f for f in solv.system.getForces() if isinstance(f, openmm.NonbondedForce))
    env_charges, env_mols = (), ()
    if with_environment:
        rset = set(region)
        env = [a for a in atoms if a.index not in rset]
        env_charges = tuple(nb.getParticleParameters(a.index)[0].value_in_unit(unit.elementary_charge) for a in env)
        env_mols = tuple(a.residue.index for a in env)
    return RegionInfo(
        symbols=tuple(atoms[i].element.symbol for i in region),
        atomic_numbers=tuple(atoms[i].element.atomic_number for i in region),
        net_charge=int(solv.net_charge),
        classical_charges=tuple(float(q) for q in solv.region_charges),
        bonds=region_bonds_from_topology(solv.topology, region),
        environment_charges=env_charges,
        environment_molecules=env_mols,
    )


def _term_options(treatment: Treatment, module: str, model: str, term_options: dict) -> dict:
    opts = dict(term_options.get(module, {}))
    if module == "ani":
        from .terms.ani import DEFAULT_PRECISION

        opts.setdefault("model", model)
        opts.setdefault("precision", DEFAULT_PRECISION)  # stated in the report either way
    return opts


def _start_point(callable_: RegionTermForce, solv: SolvatedSystem, region: tuple, environment: tuple) -> dict:
    """The term's energy (kJ/mol) and extras at the start structure, for the report."""
    idx = list(region) + (list(environment) if callable_.uses_environment else [])
    box = solv.box_vectors_nm() if solv.system.usesPeriodicBoundaryConditions() else None
    result, _ = callable_.evaluate(np.asarray(solv.positions)[idx], box)
    keep = {k: v for k, v in result.extras.items()
            if k in ("charges", "charges_vacuum", "dipole_debye", "dipole_vacuum_debye",
                     "ensemble_std_kjmol", "ensemble_std_per_atom_kjmol", "n_molecules_in_cutoff")}
    return {"energy": float(result.energy), "extras": _plain(keep)}


def _plain(d: dict) -> dict:
    return {k: (np.asarray(v).tolist() if isinstance(v, (np.ndarray, list, tuple)) else
                float(v) if isinstance(v, (np.floating, float)) else v) for k, v in d.items()}


def apply_treatment(solv: SolvatedSystem, treatment: Union[str, Treatment], *, model: str = "ani1x",
                    term_options: Optional[dict] = None) -> BuiltSystem:
    """Apply a treatment to a classical solvated system (which is left unchanged)."""
    t = get_treatment(treatment) if isinstance(treatment, str) else treatment
    term_options = dict(term_options or {})
    unknown = set(term_options) - set(t.terms)
    if unknown:
        raise OptionError(
            f"term options given for {sorted(unknown)}, which treatment {t.name!r} does not use "
            f"(its terms: {list(t.terms) or 'none'})."
        )
    if t.uses_ml and model not in ML_MODELS:
        raise TreatmentError(f"unknown ML model {model!r}; choose one of {', '.join(ML_MODELS)}.")
    system = openmm.XmlSerializer.clone(solv.system)
    region = tuple(solv.region)
    meta = dict(solv.metadata)
    meta.update({"mlbridge_version": __version__, "treatment": t.name, "treatment_summary": t.summary,
                 "force_groups": {"0": "classical"}, "terms": []})
    if t.terms:
        meta["removed_region_internal"] = remove_region_internal(system, region)
        meta["embedding"] = ("QEq embedding: region charges zeroed in the NonbondedForce, LJ kept"
                             if t.replaces_region_coulomb else
                             "mechanical embedding: region-water LJ and fixed-charge Coulomb (PME) kept")
    if t.replaces_region_coulomb:
        zero_region_charges(system, region)
    periodic = system.usesPeriodicBoundaryConditions()
    rset = set(region)
    environment = tuple(i for i in range(system.getNumParticles()) if i not in rset)
    needs_env = any(m == "qeq" for m in t.terms)
    info = region_info(solv, with_environment=needs_env)
    tree = bond_tree(info.n_atoms, info.bonds)
    first_content = None
    placed = []
    for k, module in enumerate(t.terms):
        opts = _term_options(t, module, model, term_options)
        if module == "d3":
            from .terms.d3 import require_missing_dispersion
            require_missing_dispersion(first_content, model)
        callable_ = RegionTermForce(module, opts, info, tree)
        term = callable_.term  # built now: domain checks fail at build time, not mid-run
        callable_.uses_environment = bool(term.uses_environment)
        if k == 0:
            first_content = term.content
        group = FIRST_TERM_GROUP + k
        placed.append((callable_, group))
        meta["force_groups"][str(group)] = term.name
        start = _start_point(callable_, solv, region, environment)
        meta["terms"].append(dict(term.describe(), module=module, options=opts, group=group,
                                  ledger_key=callable_.key, start_energy_kjmol=start["energy"],
                                  start_extras=start["extras"]))
        if module == "d3":
            meta["d3_start_energy_kjmol"] = start["energy"]
        if module == "qeq":
            meta["qeq_start"] = start["extras"]
    if placed:
        add_region_forces(system, placed, region, environment, periodic)
    return BuiltSystem(system=system, topology=solv.topology, positions=np.array(solv.positions),
                       region=region, treatment=t.name, metadata=meta, solvated=solv)


def build(source: Union[str, os.PathLike, Ligand, SolvatedSystem], treatment: str = "classical", *,
          model: str = "ani1x", smiles: Optional[str] = None, name: Optional[str] = None,
          padding=1.2, box_shape: str = "cube", salt_molar=0.0, cutoff=0.9,
          density_equilibration_ps: float = 2.0, term_options: Optional[dict] = None,
          cache_dir: Optional[Path] = None) -> BuiltSystem:
    """Build a ligand-in-water system with the given treatment.

    Parameters
    ----------
    source : SMILES, a ligand file (SDF/MOL/MOL2; PDB with ``smiles=``), a Ligand, or a
        SolvatedSystem (e.g. from :func:`mlbridge.prepared.load_prepared`)
    treatment : one of :data:`mlbridge.treatments.TREATMENTS`
    model : ML potential for the ``ml*`` treatments (ani1x, ani1ccx, ani2x)
    padding : distance, default 1.2 nm; box_shape : "cube" | "octahedron"; salt_molar : M NaCl
    cutoff : distance, default 0.9 nm
    term_options : {term module: {option: value}}, e.g. {"qeq": {"mode": "rappe-goddard"}}
    """
    if isinstance(source, SolvatedSystem):
        solv = source
    else:
        lig = source if isinstance(source, Ligand) else load_ligand(source, smiles=smiles, name=name)
        solv = solvate(lig, padding=padding, box_shape=box_shape, salt_molar=salt_molar, cutoff=cutoff,
                       density_equilibration_ps=density_equilibration_ps, cache_dir=cache_dir)
    return apply_treatment(solv, treatment, model=model, term_options=term_options)
