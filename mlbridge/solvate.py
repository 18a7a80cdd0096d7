"""Solvation: the ligand in a TIP3P box with neutralising ions -> :class:`SolvatedSystem`.

tleap builds the box from its pre-equilibrated TIP3P block (``solvateBox ... iso`` for a cube,
``solvateOct`` for a truncated octahedron), ``addIonsRand`` replaces waters by Na+/Cl-
(Joung & Cheatham, J. Phys. Chem. B 112, 9020 (2008) parameters for TIP3P) to neutralise and to
reach an optional salt concentration. OpenMM then creates the System with PME (Essmann et al.,
J. Chem. Phys. 103, 8577 (1995)), a 0.9 nm cutoff, rigid water (SETTLE) and X-H bond constraints.

TIP3P: Jorgensen et al., J. Chem. Phys. 79, 926 (1983).
"""
from __future__ import annotations

import io
import warnings
import tempfile
from xml.sax.saxutils import quoteattr
from dataclasses import dataclass, field
from pathlib import Path
from typing import Optional

import numpy as np
import openmm
import openmm.app as app
import openmm.unit as unit

from .errors import LigandInputError
from .ligand import Ligand
from .parameters import LigandParameters, parametrize, run_tleap, vacuum_topology, write_mol2

#: molar concentration of pure water at 298 K, mol/L (0.997 g/cm3 / 18.015 g/mol); used to
#: turn a salt molarity into an ion count from the number of waters (common practice).
WATER_MOLARITY = 55.34

BOX_SHAPES = ("cube", "octahedron")
WATER_RESIDUES = ("HOH", "WAT")


@dataclass
class SolvatedSystem:
    """A classical system with a ligand (the future region) in it.

    Attributes
    ----------
    system : openmm.System, full classical system (GAFF2/AM1-BCC ligand, TIP3P, PME)
    topology : openmm.app.Topology
    positions : (N, 3) ndarray, nm
    region : tuple of int, atom indices of the ligand
    region_charges : (n_R,) ndarray, classical partial charges of the region, e
    net_charge : int, region net charge, e
    ligand : Ligand or None (None for a prepared system without a chemistry model)
    metadata : dict, how it was built (box, ions, cutoff, constraints, timestep, ...)
    """

    system: openmm.System
    topology: app.Topology
    positions: np.ndarray
    region: tuple
    region_charges: np.ndarray
    net_charge: int
    ligand: Optional[Ligand] = None
    metadata: dict = field(default_factory=dict)

    @property
    def n_atoms(self) -> int:
        return self.system.getNumParticles()

    def box_vectors_nm(self) -> np.ndarray:
        """(3, 3) periodic box vectors (rows), nm."""
        return np.array([list(v.value_in_unit(unit.nanometer)) for v in
                         self.system.getDefaultPeriodicBoxVectors()])

    def water_count(self) -> int:
        return sum(1 for r in self.topology.residues() if r.name in WATER_RESIDUES)

    def box_volume_nm3(self) -> float:
        return float(abs(np.linalg.det(self.box_vectors_nm())))


def _as_nm(value, name: str) -> float:
    if unit.is_quantity(value):
        return float(value.value_in_unit(unit.nanometer))
    return float(value)


def _as_molar(value) -> float:
    if unit.is_quantity(value):
        return float(value.value_in_unit(unit.molar))
    return float(value)


#: PME accuracy. Tighter than OpenMM's default 5e-4: measured here (TIP3P box, 2.4 nm, 1 fs NVE,
#: CPU platform), 5e-4 drifts -0.008 to -0.012 kT/ns per DOF from the real-space truncation,
#: 1e-4 drifts -0.002 to -0.004 with a 4x smaller fluctuation ratio.
EWALD_ERROR_TOLERANCE = 1e-4


def system_options(cutoff_nm: float) -> dict:
    """The createSystem options every mlbridge system uses (also stored in the metadata)."""
    return dict(nonbondedMethod=app.PME, nonbondedCutoff=cutoff_nm * unit.nanometer,
                constraints=app.HBonds, rigidWater=True, ewaldErrorTolerance=EWALD_ERROR_TOLERANCE)


def box_vectors(solute_nm: np.ndarray, padding_nm: float, box_shape: str, scale: float = 1.0) -> tuple:
    """Periodic box vectors (nm Vec3 rows) with at least ``padding_nm`` from the solute to every face.

    The solute is enclosed in the sphere around the centre of its bounding box; the distance
    between opposite faces is w = 2 r + 2 padding. A cube has edge w; the truncated octahedron
    (the reduced form OpenMM uses) has w between opposite hexagonal and square faces, its volume
    is 0.770 w^3 (Bekker, J. Comput. Chem. 18, 1930 (1997), from memory).
    """
    lo, hi = solute_nm.min(axis=0), solute_nm.max(axis=0)
    r = float(np.max(np.linalg.norm(solute_nm - 0.5 * (lo + hi), axis=1)))
    w = (2.0 * r + 2.0 * padding_nm) * scale
    if box_shape == "cube":
        vecs = ((w, 0, 0), (0, w, 0), (0, 0, w))
    else:
        vecs = ((w, 0, 0), (w / 3, 2 * np.sqrt(2) * w / 3, 0), (-w / 3, np.sqrt(2) * w / 3, np.sqrt(6) * w / 3))
    return tuple(openmm.Vec3(*map(float, v)) * unit.nanometer for v in vecs)


#: density of TIP3P at 300 K and 1 bar, g/cm3 (about 0.98; Jorgensen et al. 1983 and later
#: reevaluations, from memory). Used only to size the placement box before the NPT step.
TIP3P_DENSITY_300K = 0.98
#: the NPT step goes on until the water density reaches this fraction of TIP3P_DENSITY_300K
SETTLED_FRACTION = 0.985
WATER_MASS_G_MOL = 18.015


def achieved_padding(solute_nm: np.ndarray, box_nm: np.ndarray) -> float:
    """Half the closest distance between the solute and any of its periodic images, nm.

    For a cube of edge 2 r + 2 p around a sphere of radius r this is p, the padding; it is
    defined the same way for every box shape. Images within one lattice step are searched
    (enough for boxes in OpenMM's reduced form).
    """
    shifts = [i * box_nm[0] + j * box_nm[1] + k * box_nm[2]
              for i in (-1, 0, 1) for j in (-1, 0, 1) for k in (-1, 0, 1) if (i, j, k) != (0, 0, 0)]
    d = solute_nm[:, None, :] - solute_nm[None, :, :]
    return float(min(np.linalg.norm(d - L, axis=-1).min() for L in shifts) / 2.0)


def _water_density(modeller: "app.Modeller") -> float:
    n = sum(1 for r in modeller.topology.residues() if r.name in WATER_RESIDUES)
    vol = abs(np.linalg.det(np.array(modeller.topology.getPeriodicBoxVectors().value_in_unit(unit.nanometer))))
    return n * WATER_MASS_G_MOL / 6.02214076e23 / (vol * 1e-21)


def _place(ff, lig_top, ligand: Ligand, vectors, salt: float) -> "app.Modeller":
    modeller = app.Modeller(lig_top.topology, ligand.positions_nm * unit.nanometer)
    modeller.addSolvent(ff, model="tip3p", boxVectors=vectors, positiveIon="Na+", negativeIon="Cl-",
                        ionicStrength=salt * unit.molar, neutralize=True)
    return modeller


def relax(system: openmm.System, positions_nm: np.ndarray, npt_ps: float, *,
          temperature_k: float = 300.0, threads: int = 2, settled=None,
          max_extra_ps: float = 10.0) -> tuple:
    """Minimise, then (if ``npt_ps`` > 0) run NPT at 1 bar to bring the water to its density.

    Langevin middle integrator (Zhang et al., J. Phys. Chem. A 123, 6056 (2019)), 2 fs, 1/ps
    friction; Monte Carlo barostat every 25 steps (Chow & Ferguson, Comput. Phys. Commun. 91, 283
    (1995); Aqvist et al., Chem. Phys. Lett. 384, 288 (2004)). With ``settled(box_nm) -> bool``
    the NPT run goes on in 1 ps pieces, at most ``max_extra_ps`` more, until it returns True.
    Returns (positions, box) in nm and the NPT time run, ps.
    """
    system = openmm.XmlSerializer.clone(system)
    if npt_ps > 0:
        system.addForce(openmm.MonteCarloBarostat(1.0 * unit.bar, temperature_k * unit.kelvin, 25))
    integ = openmm.LangevinMiddleIntegrator(temperature_k * unit.kelvin, 1.0 / unit.picosecond,
                                            0.002 * unit.picoseconds)
    integ.setRandomNumberSeed(2026)
    ctx = openmm.Context(system, integ, openmm.Platform.getPlatformByName("CPU"),
                         {"Threads": str(threads)})
    ctx.setPositions(positions_nm * unit.nanometer)
    openmm.LocalEnergyMinimizer.minimize(ctx, 10.0, 500)
    ran = 0.0
    if npt_ps > 0:
        ctx.setVelocitiesToTemperature(temperature_k * unit.kelvin, 2026)
        integ.step(int(round(npt_ps / 0.002)))
        ran = float(npt_ps)
        while settled is not None and ran < npt_ps + max_extra_ps:
            box = ctx.getState().getPeriodicBoxVectors(asNumpy=True).value_in_unit(unit.nanometer)
            if settled(np.array(box)):
                break
            integ.step(500)
            ran += 1.0
    st = ctx.getState(getPositions=True)
    box = np.array(st.getPeriodicBoxVectors().value_in_unit(unit.nanometer))
    pos = np.array(st.getPositions(asNumpy=True).value_in_unit(unit.nanometer))
    return pos, box, ran


def _placement_template(lig_top: "app.AmberPrmtopFile", resname: str) -> str:
    """A ForceField XML with the ligand's charges and LJ parameters only (no bonded terms).

    Modeller.addSolvent uses a ForceField just to read the solute's LJ radii and total charge;
    the real parameters of the system come from tleap afterwards.
    """
    vac = lig_top.createSystem(nonbondedMethod=app.NoCutoff)
    nb = next(f for f in vac.getForces() if isinstance(f, openmm.NonbondedForce))
    atoms = list(lig_top.topology.atoms())
    types, res, nbs = [], [], []
    for a in atoms:
        q, sig, eps = nb.getParticleParameters(a.index)
        t = f"mlb-{resname}-{a.index}"
        types.append(f'<Type name={quoteattr(t)} class={quoteattr(t)} element="{a.element.symbol}" mass="{a.element.mass.value_in_unit(unit.dalton)}"/>')
        res.append(f'<Atom name={quoteattr(a.name)} type={quoteattr(t)}/>')
        nbs.append(f'<Atom type={quoteattr(t)} charge="{q.value_in_unit(unit.elementary_charge)}" '
                   f'sigma="{sig.value_in_unit(unit.nanometer)}" epsilon="{eps.value_in_unit(unit.kilojoule_per_mole)}"/>')
    for b in lig_top.topology.bonds():
        res.append(f'<Bond atomName1={quoteattr(b[0].name)} atomName2={quoteattr(b[1].name)}/>')
    return ("<ForceField><AtomTypes>" + "".join(types) + "</AtomTypes><Residues><Residue name="
            + quoteattr(resname) + ">" + "".join(res) + "</Residue></Residues>"
            '<NonbondedForce coulomb14scale="0.833333" lj14scale="0.5">' + "".join(nbs)
            + "</NonbondedForce></ForceField>")


def solvate(ligand: Ligand, *, padding=1.2, box_shape: str = "cube", salt_molar=0.0,
            cutoff=0.9, density_equilibration_ps: float = 2.0,
            params: Optional[LigandParameters] = None,
            cache_dir: Optional[Path] = None) -> SolvatedSystem:
    """Put ``ligand`` in a TIP3P box and build the classical OpenMM System.

    Parameters
    ----------
    ligand : Ligand
    padding : distance, default 1.2 nm, from the ligand to the box edge (tleap's buffer)
    box_shape : "cube" or "octahedron" (truncated octahedron)
    salt_molar : concentration, default 0 M, NaCl on top of the neutralising ions
    cutoff : distance, default 0.9 nm, real-space cutoff of PME and LJ (0.9-1.0 nm allowed)
    density_equilibration_ps : float, default 2 ps, NPT (1 bar, 300 K) after minimisation that
        closes the gaps Modeller leaves at the box faces, extended in 1 ps pieces (at most 10 ps
        more) until the water density is within 1.5% of TIP3P's (a warning and
        ``metadata["density_warning"]`` if it is not); 0 keeps the placed box (minimised only)
    """
    padding_nm = _as_nm(padding, "padding")
    cutoff_nm = _as_nm(cutoff, "cutoff")
    salt = _as_molar(salt_molar)
    if box_shape not in BOX_SHAPES:
        raise LigandInputError(f"box_shape {box_shape!r} is not one of {BOX_SHAPES}.")
    if not 0.9 <= cutoff_nm <= 1.0:
        raise LigandInputError(f"cutoff {cutoff_nm} nm is outside 0.9-1.0 nm, the range mlbridge supports with PME.")
    if padding_nm < cutoff_nm:
        raise LigandInputError(
            f"padding {padding_nm} nm is below the cutoff {cutoff_nm} nm; the ligand would see its "
            "own periodic image. Use padding >= 1.0 nm (default 1.2 nm)."
        )
    if salt < 0:
        raise LigandInputError(f"salt concentration {salt} M is negative.")
    params = params or parametrize(ligand, cache_dir=cache_dir)
    with tempfile.TemporaryDirectory(prefix="mlbridge-solvate-") as tmp:
        work = Path(tmp)
        vac_prmtop, _ = vacuum_topology(ligand, params, work / "vacuum", resname=ligand.name)
        lig_top = app.AmberPrmtopFile(str(vac_prmtop))
        # 1. place water and ions with OpenMM's Modeller (pre-equilibrated TIP3P block, bulk
        #    density); it needs only the ligand's charges and LJ radii, from a minimal template.
        ff = app.ForceField("amber14/tip3p.xml")
        ff.loadFile(io.StringIO(_placement_template(lig_top, ligand.name)))
        scale = 1.0
        if density_equilibration_ps > 0:
            # Modeller leaves gaps at the box faces (pure water comes out ~4% under bulk density);
            # the NPT step below closes them and shrinks the box. Place in a box enlarged by the
            # expected shrinkage so that the padding still holds afterwards.
            trial = _place(ff, lig_top, ligand, box_vectors(ligand.positions_nm, padding_nm, box_shape), 0.0)
            rho = _water_density(trial)
            scale = (TIP3P_DENSITY_300K / rho) ** (1.0 / 3.0) if rho < TIP3P_DENSITY_300K else 1.0
        vectors = box_vectors(ligand.positions_nm, padding_nm, box_shape, scale=scale)
        modeller = _place(ff, lig_top, ligand, vectors, salt)
        box = modeller.topology.getPeriodicBoxVectors()
        for res in modeller.topology.residues():  # tleap's names of the Joung-Cheatham ions
            if res.name in ("NA", "CL"):
                res.name = {"NA": "Na+", "CL": "Cl-"}[res.name]
                for atom in res.atoms():
                    atom.name = res.name
        with open(work / "placed.pdb", "w") as fh:
            app.PDBFile.writeFile(modeller.topology, modeller.positions, fh, keepIds=False)
        # 2. build the topology of the whole system with tleap (GAFF2 ligand, TIP3P, JC ions).
        write_mol2(ligand, params, work / "ligand.mol2", resname=ligand.name)
        (work / "ligand.frcmod").write_text(params.frcmod)
        lengths = [np.linalg.norm(v.value_in_unit(unit.angstrom)) for v in box]
        run_tleap("source leaprc.gaff2\nsource leaprc.water.tip3p\n"
                  f"{ligand.name} = loadmol2 ligand.mol2\nloadamberparams ligand.frcmod\n"
                  "sys = loadpdb placed.pdb\n"
                  f"set sys box {{ {lengths[0]:.4f} {lengths[1]:.4f} {lengths[2]:.4f} }}\n"
                  "saveamberparm sys solvated.prmtop solvated.inpcrd", work, ligand.smiles)
        prmtop = app.AmberPrmtopFile(str(work / "solvated.prmtop"), periodicBoxVectors=box)
        system = prmtop.createSystem(**system_options(cutoff_nm))
        system.setDefaultPeriodicBoxVectors(*box)
        positions = np.array(modeller.getPositions().value_in_unit(unit.nanometer))
        if prmtop.topology.getNumAtoms() != len(positions):
            raise LigandInputError(
                f"tleap built {prmtop.topology.getNumAtoms()} atoms from {len(positions)} placed ones; "
                f"see the tleap log (residue names of the ligand must not clash with water or ions)."
            )
    n_water = sum(1 for r in prmtop.topology.residues() if r.name in WATER_RESIDUES)

    def water_density(box_nm) -> float:  # g/cm3, from the water count and the box volume
        return n_water * WATER_MASS_G_MOL / 6.02214076e23 / (abs(np.linalg.det(box_nm)) * 1e-21)

    # Modeller's gaps at the faces of octahedral boxes can take longer than 2 ps to close: go on
    # until the water is within 1.5% of TIP3P's density (at most 10 ps more).
    positions, box_nm, npt_ran_ps = relax(
        system, positions, density_equilibration_ps, temperature_k=300.0,
        settled=lambda b: water_density(b) >= SETTLED_FRACTION * TIP3P_DENSITY_300K)
    density = water_density(box_nm)
    density_note = ""
    if density_equilibration_ps > 0 and density < SETTLED_FRACTION * TIP3P_DENSITY_300K:
        density_note = (f"WARNING: water density {density:.3f} g/cm3 after {npt_ran_ps:g} ps NPT, "
                        f"below {SETTLED_FRACTION * TIP3P_DENSITY_300K:.3f}; equilibrate longer at NPT "
                        "before production.")
        warnings.warn(density_note, stacklevel=2)
    system.setDefaultPeriodicBoxVectors(*(openmm.Vec3(*v) for v in box_nm))
    prmtop.topology.setPeriodicBoxVectors([openmm.Vec3(*v) for v in box_nm] * unit.nanometer)
    region = tuple(a.index for a in prmtop.topology.atoms() if a.residue.name == ligand.name)
    if len(region) != ligand.n_atoms:
        raise LigandInputError(
            f"found {len(region)} atoms of residue {ligand.name!r} after solvation, expected "
            f"{ligand.n_atoms}; give the ligand a residue name that is not used by water or ions."
        )
    n_ions = {"Na+": 0, "Cl-": 0}
    for r in prmtop.topology.residues():
        if r.name in ("Na+", "NA"):
            n_ions["Na+"] += 1
        elif r.name in ("Cl-", "CL"):
            n_ions["Cl-"] += 1
    solv = SolvatedSystem(system=system, topology=prmtop.topology, positions=positions,
                          region=region, region_charges=np.asarray(params.charges, float),
                          net_charge=ligand.net_charge, ligand=ligand)
    solv.metadata.update({
        "source": "built from ligand",
        "ligand_smiles": ligand.smiles,
        "ligand_name": ligand.name,
        "ligand_net_charge_e": ligand.net_charge,
        "force_field": "GAFF2 (ligand), TIP3P (water), Joung-Cheatham ions",
        "charges": "AM1-BCC (antechamber/sqm)",
        "parameters_from_cache": params.from_cache,
        "box_shape": box_shape,
        "padding_nm": padding_nm,
        "padding_achieved_nm": round(achieved_padding(positions[list(region)], solv.box_vectors_nm()), 4),
        "density_equilibration": f"minimised, then {npt_ran_ps:g} ps NPT at 1 bar, 300 K (MC barostat)"
        if density_equilibration_ps > 0 else "minimised only",
        "water_density_g_cm3": round(density, 4),
        **({"density_warning": density_note} if density_note else {}),
        "box_vectors_nm": solv.box_vectors_nm().round(6).tolist(),
        "box_volume_nm3": round(solv.box_volume_nm3(), 6),
        "n_waters": solv.water_count(),
        "ions": n_ions,
        "salt_molar": salt,
        "nonbonded": f"PME, cutoff {cutoff_nm} nm, ewaldErrorTolerance {EWALD_ERROR_TOLERANCE}",
        "cutoff_nm": cutoff_nm,
        "constraints": "HBonds (X-H bonds rigid), rigid TIP3P water (SETTLE)",
        "built_for_timestep_fs": 2.0,
        "timestep_note": "built for dt <= 2 fs with these constraints; the NVE check uses 1 fs by default",
    })
    return solv
