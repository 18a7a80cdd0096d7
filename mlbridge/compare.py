"""Treatments side by side from one start structure: forces, structure, drift and speed.

:func:`compare` builds every requested treatment of one :class:`~mlbridge.solvate.SolvatedSystem`
and, for each, from the same start structure (``solv.positions``):

1. **single point** at the start structure: energy per force group (kJ/mol; group 0 is the
   classical part, groups 1.. the region terms), the total force on each region atom (all groups,
   kJ/mol/nm) and its difference from the reference treatment's,

       RMS diff = sqrt( (1/n_R) sum_i |F_i^T - F_i^ref|^2 ),   max diff = max_i |F_i^T - F_i^ref|

   (|.| the per-atom vector norm, kJ/mol/nm);
2. **a short NVT run**: minimise (L-BFGS, tolerance 10 kJ/mol/nm, at most 200 iterations by
   default, as the NVE check does), then ``LangevinMiddleIntegrator`` at 300 K, friction 1/ps, timestep ``dt_fs``,
   for ``run_ps``, sampling positions and per-group energies every ``sample_interval_steps``
   steps; the structural observables below come from these frames;
3. **the NVE check** :func:`mlbridge.drift.check_setup` (drift, speed with its time breakdown,
   ANI ensemble spread, QEq charges and dipole, warnings), started from the structure minimised in
   step 2 (so it does not minimise again).

Absolute energies of different treatments are not comparable: each region potential has its own
reference (GAFF2 force-field zero, ANI's atomic self-energies of wB97X/6-31G(d), GFN2-xTB's
electronic energy). The report therefore compares *relative* energies (the fluctuation of each
treatment's potential energy about its own mean along the run), forces and structures.

Observables (all from :mod:`mlbridge.observables`; positions in nm, angles in degrees)
======================================================================================
============================  ===================================================================
torsions                      one dihedral per rotatable bond of the ligand
                              (:func:`~mlbridge.observables.rotatable_torsions`: RDKit's strict
                              rotatable-bond SMARTS plus the X-H rotors of terminal OH/NH/SH);
                              IUPAC sign convention, [-180, 180); normalised histograms of
                              ``TORSION_BINS`` bins (1/degree, integral 1)
radial distribution g(r)      ligand polar atoms (N, O), each on its own and all together, to
                              water oxygens; minimum image, ideal-gas normalisation (g -> 1 at
                              long range); r up to ``min(1.0 nm, 0.49 h_min)`` (h_min the shortest
                              box height, below which the minimum image is exact), bins of
                              ``RDF_BIN_NM``; dimensionless. First peak: position (nm) and height
hydrogen bonds                geometric criterion r(D-A) < 0.35 nm and angle H-D-A < 30 degrees
                              (GROMACS ``gmx hbond`` default); ligand donors (H on N/O) to water
                              O, and water O-H to ligand acceptors (N, O, not N+ or 4-bonded N);
                              count per frame, mean and standard deviation over the frames
RMSD                          ligand heavy atoms made whole, superposed (Kabsch, equal weights)
                              on the common start structure ``solv.positions``; nm, mean and max
                              over the frames
potential-energy fluctuation  std and max - min of the potential energy along the NVT run,
                              kJ/mol, about the treatment's own mean
============================  ===================================================================

Output folder (written atomically: built in a temporary sibling and renamed into place)
=======================================================================================
=====================  ===========================================================================
comparison.json        everything above, units in the key names (``ms_per_step``,
                       ``drift_kT_per_ns_per_dof``, ``force_rms_diff_kjmol_nm``, ...), plus each
                       treatment's full NVE check (:meth:`CheckResult.to_dict`); strict JSON
                       (a number that could not be computed is null)
comparison.md          warnings first, the not-comparable statement, a table with one column per
                       treatment, notes and the plots
energy.png             NVE total energy minus its start; NVT potential energy minus its mean
torsions.png           torsion histograms, one panel per rotatable torsion, treatments overlaid
rdf.png                ligand polar atom - water O g(r), one panel per site, treatments overlaid
speed.png              ms/step: classical part and region terms stacked, measured ms/step marked
=====================  ===========================================================================

A treatment that cannot be built here (outside the potential's domain, weights not on disk, an
optional backend not installed, a combination refused as double counting) is listed as
*skipped* with the reason; one that fails while running (an mlbridge error or OpenMM's "NaN"
error) as *failed*. If that treatment is the reference, :func:`compare` raises instead.
"""
from __future__ import annotations

import json
import math
import time
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Optional, Sequence

import numpy as np
import openmm
import openmm.unit as unit

from . import __version__
from . import observables as obs
from .build import BuiltSystem, _jsonable, apply_treatment, atomic_folder
from .drift import DRIFT_THRESHOLD_KT_PER_NS_PER_DOF, _progress, check_setup, cpu_context, set_threads
from .errors import MlbridgeError, OptionError
from .solvate import SolvatedSystem
from .treatments import TREATMENTS, get_treatment

__all__ = ["compare", "single_point", "sample_nvt", "structural_observables", "NOT_COMPARABLE",
           "TORSION_BINS", "RDF_BIN_NM", "RDF_R_MAX_NM"]

#: The statement the report makes about absolute energies (DESIGN.md section 7).
NOT_COMPARABLE = (
    "Absolute energies of different treatments are not comparable: each region potential has its "
    "own reference (GAFF2's force-field zero, ANI's atomic self-energies, GFN2-xTB's electronic "
    "energy), so the totals differ by large constants that mean nothing. This report compares "
    "relative energies (each treatment's potential-energy fluctuation about its own mean along the "
    "run, and the drift of its NVE total energy), forces at the common start structure, and "
    "structural observables."
)

#: torsion histogram bins over 360 degrees (10-degree bins)
TORSION_BINS = 36
#: RDF bin width, nm
RDF_BIN_NM = 0.02
#: RDF range, nm (reduced below half the shortest box height when the box is small)
RDF_R_MAX_NM = 1.0
#: NVT thermostat of the sampling run
TEMPERATURE_K = 300.0
FRICTION_PER_PS = 1.0
#: minimiser settings (the same as the NVE check's)
MINIMIZE_TOLERANCE_KJMOL_NM = 10.0
MINIMIZE_MAX_ITERATIONS = 200


@dataclass
class TreatmentComparison:
    """What :func:`compare` found for one treatment (plain data; see :meth:`to_dict`)."""

    name: str
    summary: str = ""
    status: str = "ok"  # "ok" | "skipped" | "failed"
    reason: str = ""
    single_point: dict = field(default_factory=dict)
    run: dict = field(default_factory=dict)
    check: object = None  # CheckResult
    built: Optional[BuiltSystem] = None
    stage_seconds: dict = field(default_factory=dict)

    @property
    def has_qeq(self) -> bool:
        return "qeq" in get_treatment(self.name).terms

    @property
    def warnings(self) -> list:
        return list(self.check.warnings) if self.check is not None else []

    def to_dict(self) -> dict:
        d = {"name": self.name, "summary": self.summary, "status": self.status, "reason": self.reason,
             "single_point": self.single_point, "run": self.run, "stage_seconds": self.stage_seconds}
        if self.check is not None:
            d["check"] = _check_summary(self.check, self.has_qeq)
            d["check_full"] = self.check.to_dict()
        return d


# ---------------------------------------------------------------------------------------
# the three stages
# ---------------------------------------------------------------------------------------
def single_point(built: BuiltSystem, positions_nm=None, *, threads: int = 2) -> dict:
    """Energies by force group and the total force on each region atom at one structure.

    Parameters
    ----------
    built : BuiltSystem
    positions_nm : (N, 3) array, nm; default ``built.positions``
    threads : CPU threads

    Returns
    -------
    dict with
      ``energy_groups``: list of {group, term, energy_kjmol} (group 0: the classical part);
      ``energies_kjmol``: {term name: kJ/mol};
      ``potential_energy_kjmol``: sum over the groups (its absolute value means nothing across
      treatments; see :data:`NOT_COMPARABLE`);
      ``region_forces_kjmol_nm``: (n_R, 3) list, total force (all groups) on the region atoms in
      region order, kJ/mol/nm;
      ``region_force_rms_kjmol_nm``: sqrt(mean_i |F_i|^2).
    """
    set_threads(threads)
    pos = np.asarray(built.positions if positions_nm is None else positions_nm, float)
    ctx = cpu_context(built.system, openmm.VerletIntegrator(0.001), threads)
    ctx.setPositions(pos * unit.nanometer)
    groups = []
    for g, label in sorted(built.force_groups.items()):
        e = ctx.getState(getEnergy=True, groups={g}).getPotentialEnergy().value_in_unit(unit.kilojoule_per_mole)
        groups.append({"group": int(g), "term": label, "energy_kjmol": float(e)})
    f = ctx.getState(getForces=True).getForces(asNumpy=True).value_in_unit(unit.kilojoule_per_mole / unit.nanometer)
    fr = np.asarray(f)[list(built.region)]
    del ctx
    return {
        "energy_groups": groups,
        "energies_kjmol": {x["term"]: x["energy_kjmol"] for x in groups},
        "potential_energy_kjmol": float(sum(x["energy_kjmol"] for x in groups)),
        "region_forces_kjmol_nm": fr.tolist(),
        "region_force_rms_kjmol_nm": float(np.sqrt(np.mean(np.sum(fr ** 2, axis=1)))) if len(fr) else 0.0,
    }


def force_differences(forces_kjmol_nm, reference_kjmol_nm) -> dict:
    """RMS and maximum of the per-atom force-difference norm |F_i - F_i^ref|, kJ/mol/nm."""
    d = np.linalg.norm(np.asarray(forces_kjmol_nm, float) - np.asarray(reference_kjmol_nm, float), axis=1)
    if d.size == 0:
        return {"force_rms_diff_kjmol_nm": 0.0, "force_max_diff_kjmol_nm": 0.0}
    return {"force_rms_diff_kjmol_nm": float(np.sqrt(np.mean(d ** 2))),
            "force_max_diff_kjmol_nm": float(d.max())}


@dataclass
class Sampling:
    """Frames of an NVT run (see :func:`sample_nvt`).

    Attributes
    ----------
    minimized_positions : (N, 3) array, nm, the structure the run started from
    frames : (n_frames, N, 3) array, nm, one every ``sample_interval_steps`` steps from the first
        interval on (the minimised structure itself, at 0 K, is not a frame)
    boxes : (n_frames, 3, 3) array, nm, box vectors as rows
    times_ps : (n_frames,) array, ps
    group_energies_kjmol : {term name: (n_frames,) array}, kJ/mol
    """

    minimized_positions: np.ndarray
    frames: np.ndarray
    boxes: np.ndarray
    times_ps: np.ndarray
    group_energies_kjmol: dict

    @property
    def potential_kjmol(self) -> np.ndarray:
        return np.sum(list(self.group_energies_kjmol.values()), axis=0)


def sample_nvt(built: BuiltSystem, *, run_ps: float, dt_fs: float = 1.0, sample_interval_steps: int = 20,
               threads: int = 2, temperature_k: float = TEMPERATURE_K, seed: int = 2026,
               progress: bool = False, minimize_max_iterations: int = MINIMIZE_MAX_ITERATIONS) -> Sampling:
    """Minimise, then run Langevin NVT (``LangevinMiddleIntegrator``, friction 1/ps) and sample.

    Parameters
    ----------
    run_ps : time, ps, of the sampled run after the minimisation
    dt_fs : timestep, fs
    sample_interval_steps : steps between frames (positions and energy of each force group); the
        first frame is one interval after the start. The Langevin noise and the initial
        velocities use the same ``seed`` for every treatment (common random numbers: differences
        between treatments then come from the potentials rather than from the noise)
    temperature_k : K
    minimize_max_iterations : int, L-BFGS iterations at most (tolerance 10 kJ/mol/nm)
    """
    if sample_interval_steps < 1:
        raise OptionError(f"sample_interval_steps must be a positive integer, got {sample_interval_steps!r}")
    set_threads(threads)
    dt_ps = dt_fs * 1e-3
    integ = openmm.LangevinMiddleIntegrator(temperature_k * unit.kelvin, FRICTION_PER_PS / unit.picosecond,
                                            dt_ps * unit.picoseconds)
    integ.setRandomNumberSeed(seed)
    n_steps = int(round(run_ps / dt_ps))
    if n_steps < sample_interval_steps:
        raise OptionError(f"run_ps = {run_ps} ps is {n_steps} steps of {dt_fs} fs, fewer than one sample interval "
                          f"({sample_interval_steps} steps): lengthen run_ps or sample more often.")
    ctx = cpu_context(built.system, integ, threads)
    ctx.setPositions(np.asarray(built.positions) * unit.nanometer)
    openmm.LocalEnergyMinimizer.minimize(ctx, MINIMIZE_TOLERANCE_KJMOL_NM, int(minimize_max_iterations))
    ctx.setVelocitiesToTemperature(temperature_k * unit.kelvin, seed)
    ctx.setTime(0.0)
    groups = sorted(built.force_groups.items())
    frames, boxes, times = [], [], []
    energies = {label: [] for _g, label in groups}

    def record():
        st = ctx.getState(getPositions=True)
        frames.append(st.getPositions(asNumpy=True).value_in_unit(unit.nanometer))
        boxes.append(st.getPeriodicBoxVectors(asNumpy=True).value_in_unit(unit.nanometer))
        times.append(st.getTime().value_in_unit(unit.picosecond))
        for g, label in groups:
            e = ctx.getState(getEnergy=True, groups={g}).getPotentialEnergy()
            energies[label].append(e.value_in_unit(unit.kilojoule_per_mole))

    minimized = np.array(ctx.getState(getPositions=True).getPositions(asNumpy=True).value_in_unit(unit.nanometer))
    bar = _progress(n_steps, f"{built.treatment}: NVT sampling", progress)
    done = 0
    while done < n_steps:
        k = min(int(sample_interval_steps), n_steps - done)
        integ.step(k)
        done += k
        record()
        if bar:
            bar.update(k)
    if bar:
        bar.close()
    del ctx
    return Sampling(minimized_positions=minimized, frames=np.asarray(frames), boxes=np.asarray(boxes),
                    times_ps=np.asarray(times), group_energies_kjmol={k: np.asarray(v) for k, v in energies.items()})


# ---------------------------------------------------------------------------------------
# observables
# ---------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Sites:
    """System atom indices the observables use, shared by every treatment."""

    torsions: tuple        # ((i, j, k, l) system indices, ...)
    torsion_labels: tuple  # ("C2-N1-C4-C5", ...)
    polar: tuple           # ligand N and O, system indices
    polar_labels: tuple
    heavy: tuple           # ligand heavy atoms, system indices
    ligand_donors: tuple   # ((D, H), ...)
    ligand_acceptors: tuple
    water_oxygens: tuple
    water_donors: tuple
    notes: tuple = ()


def observable_sites(solv: SolvatedSystem) -> Sites:
    """Atoms for the torsions, RDFs, H-bonds and RMSD of ``solv``'s ligand.

    Region atom k is system atom ``solv.region[k]`` (the region is in ligand order), so indices of
    ``solv.ligand.mol`` map through ``solv.region``. A prepared system without a chemistry model
    (``solv.ligand is None``) gets no torsions, donors from the topology's X-H bonds (X = N, O)
    and every region N and O as an acceptor.
    """
    region = np.asarray(solv.region, dtype=int)
    atoms = list(solv.topology.atoms())
    names = [atoms[i].name for i in region]
    elements = [atoms[i].element.symbol if atoms[i].element is not None else "" for i in region]
    notes = []
    if solv.ligand is not None and solv.ligand.mol.GetNumAtoms() == len(region):
        mol = solv.ligand.mol
        local_q = obs.rotatable_torsions(mol)
        donors, acceptors = obs.ligand_polar_atoms(mol, offset=0)
    else:
        local_q = []
        notes.append("no chemistry model of the ligand: torsions not analysed; donors and acceptors "
                     "taken from the topology's bonds and elements")
        rset = {int(i): k for k, i in enumerate(region)}
        donors = []
        for b in solv.topology.bonds():
            for x, h in ((b[0], b[1]), (b[1], b[0])):
                if (x.index in rset and h.index in rset and h.element is not None and x.element is not None
                        and h.element.symbol == "H" and x.element.symbol in ("N", "O")):
                    donors.append((rset[x.index], rset[h.index]))
        acceptors = [k for k, e in enumerate(elements) if e in ("N", "O")]
    polar_local = [k for k, e in enumerate(elements) if e in ("N", "O")]
    wo, wd = obs.water_atoms(solv.topology)
    return Sites(
        torsions=tuple(tuple(int(region[a]) for a in q) for q in local_q),
        torsion_labels=tuple("-".join(names[a] for a in q) for q in local_q),
        polar=tuple(int(region[k]) for k in polar_local),
        polar_labels=tuple(f"{names[k]} ({elements[k]})" for k in polar_local),
        heavy=tuple(int(region[k]) for k, e in enumerate(elements) if e not in ("H", "")),
        ligand_donors=tuple((int(region[d]), int(region[h])) for d, h in donors),
        ligand_acceptors=tuple(int(region[a]) for a in acceptors),
        water_oxygens=tuple(wo), water_donors=tuple(tuple(p) for p in wd), notes=tuple(notes),
    )


def rdf_range(box_nm) -> tuple:
    """(r_max_nm, n_bins): r_max = min(RDF_R_MAX_NM, 0.49 h_min) rounded down to a bin, bins of
    :data:`RDF_BIN_NM`; h_min is the shortest box height."""
    h_min = float(obs.box_heights(np.asarray(box_nm, float)).min())
    r_max = min(RDF_R_MAX_NM, 0.49 * h_min)
    n_bins = max(1, int(math.floor(r_max / RDF_BIN_NM + 1e-9)))
    return n_bins * RDF_BIN_NM, n_bins


def _first_peak(r, g) -> dict:
    """Position (nm) and height of the highest g(r) maximum (a plain summary, noisy when short)."""
    g = np.asarray(g, float)
    if g.size == 0 or not np.any(g > 0):
        return {"first_peak_r_nm": None, "first_peak_g": None}
    k = int(np.argmax(g))
    return {"first_peak_r_nm": float(r[k]), "first_peak_g": float(g[k])}


def structural_observables(sampling: Sampling, sites: Sites, start_positions_nm, start_box_nm) -> dict:
    """Torsion histograms, RDFs, H-bond counts and RMSD of one treatment's frames (see the module
    docstring for the definitions and criteria). Plain data, units in the key names."""
    x, boxes = sampling.frames, sampling.boxes
    out: dict = {"n_frames": int(x.shape[0])}
    # torsions
    tors = []
    if sites.torsions:
        ang = obs.dihedral_angles(x, sites.torsions, boxes)
        edges, dens = obs.torsion_histogram(ang, bins=TORSION_BINS)
        start = obs.dihedral_angles(np.asarray(start_positions_nm)[None], sites.torsions, np.asarray(start_box_nm)[None])[0]
        for q in range(len(sites.torsions)):
            rad = np.radians(ang[:, q])
            circ_mean = math.degrees(math.atan2(np.mean(np.sin(rad)), np.mean(np.cos(rad))))
            tors.append({"label": sites.torsion_labels[q], "atoms": list(sites.torsions[q]),
                         "start_deg": float(start[q]), "circular_mean_deg": circ_mean,
                         "histogram_edges_deg": edges.tolist(), "histogram_density_per_deg": dens[q].tolist()})
    out["torsions"] = tors
    # RDFs: each polar site and all together
    rdfs = []
    if sites.polar and sites.water_oxygens:
        r_max, n_bins = rdf_range(boxes[0] if boxes.ndim == 3 else boxes)
        groups = [(lab, [a]) for lab, a in zip(sites.polar_labels, sites.polar)]
        if len(sites.polar) > 1:
            groups.append(("all N, O", list(sites.polar)))
        for lab, grp in groups:
            r, g = obs.radial_distribution(x, boxes, grp, sites.water_oxygens, r_max, n_bins)
            rdfs.append(dict(site=lab, atoms=list(grp), r_nm=r.tolist(), g=g.tolist(), r_max_nm=r_max,
                             n_bins=n_bins, **_first_peak(r, g)))
    out["rdf"] = rdfs
    # hydrogen bonds
    lig_to_w = obs.hydrogen_bond_counts(x, boxes, sites.ligand_donors, sites.water_oxygens)
    w_to_lig = obs.hydrogen_bond_counts(x, boxes, sites.water_donors, sites.ligand_acceptors)
    tot = lig_to_w + w_to_lig
    out["hbonds"] = {
        "ligand_donor_to_water_mean": float(lig_to_w.mean()), "ligand_donor_to_water_std": float(lig_to_w.std()),
        "water_donor_to_ligand_mean": float(w_to_lig.mean()), "water_donor_to_ligand_std": float(w_to_lig.std()),
        "total_mean": float(tot.mean()), "total_std": float(tot.std()),
        "per_frame_total": tot.tolist(),
        "criterion": f"r(D-A) < {obs.HBOND_DISTANCE_NM} nm, angle H-D-A < {obs.HBOND_ANGLE_DEG} deg",
    }
    # RMSD of heavy atoms from the common start structure
    if sites.heavy:
        ref = obs.unwrap_around_first(np.asarray(start_positions_nm)[None], np.asarray(start_box_nm)[None], sites.heavy)[0]
        sel = obs.unwrap_around_first(x, boxes, sites.heavy)
        rmsd = obs.kabsch_rmsd(sel, ref)
        out["rmsd"] = {"mean_nm": float(rmsd.mean()), "max_nm": float(rmsd.max()), "per_frame_nm": rmsd.tolist(),
                       "atoms": "ligand heavy atoms, Kabsch superposition on the start structure, equal weights"}
    else:
        out["rmsd"] = {"mean_nm": None, "max_nm": None, "per_frame_nm": []}
    # relative energies along the run
    pot = sampling.potential_kjmol
    out["energy"] = {
        "time_ps": sampling.times_ps.tolist(),
        "potential_minus_mean_kjmol": (pot - pot.mean()).tolist(),
        "potential_std_kjmol": float(pot.std()),
        "potential_spread_kjmol": float(pot.max() - pot.min()),
        "group_std_kjmol": {k: float(np.std(v)) for k, v in sampling.group_energies_kjmol.items()},
    }
    return out


# ---------------------------------------------------------------------------------------
# the comparison
# ---------------------------------------------------------------------------------------
def _drift_status(r) -> str:
    """"pass", "drifts" or "unresolved" (the check's verdict; older results: pass or drifts)."""
    status = getattr(r, "status", None)
    return status if status else ("pass" if r.passed else "drifts")


_DRIFT_CELL = {"pass": "pass", "drifts": "**WARN: drifts**", "unresolved": "**WARN: unresolved, run longer**"}


def _check_summary(r, has_qeq: bool) -> dict:
    sp = r.speed
    d = {
        "passed": bool(r.passed),
        "drift_status": _drift_status(r),
        "drift_kjmol_per_ns": r.fit.slope_kjmol_per_ns,
        "drift_stderr_kjmol_per_ns": r.fit.slope_stderr_kjmol_per_ns,
        "drift_residual_statistical_inefficiency": r.fit.statistical_inefficiency,
        "drift_kT_per_ns_per_dof": r.fit.slope_kT_per_ns_per_dof,
        "threshold_kT_per_ns_per_dof": r.threshold_kT_per_ns_per_dof,
        "fluctuation_ratio": r.fit.fluctuation_ratio,
        "threads": sp.threads,
        "ms_per_step": sp.ms_per_step,
        "ns_per_day": sp.ns_per_day,
        "classical_ms_per_step": sp.classical_ms_per_step,
        "region_terms_ms": dict(sp.terms_ms),
        "region_terms_total_ms": sp.terms_total_ms,
        "bridge_overhead_ms": sp.bridge_overhead_ms,
        "region_terms_overlapped": sp.overlap,
        "region_terms_wait_ms": sp.wait_ms,
        "warnings": list(r.warnings),
    }
    u = r.uncertainty
    if u:
        d["ensemble_std_kjmol_mean"] = u.get("ensemble_std_kjmol_mean")
        d["ensemble_std_kjmol_max"] = u.get("ensemble_std_kjmol_max")
        d["ensemble_rho_kcal_per_sqrt_atom_max"] = u.get("rho_kcal_per_sqrt_atom_max")
    q = r.qeq
    if q and has_qeq:
        d["qeq_dipole_debye_mean"] = q.get("dipole_debye_mean")
        d["qeq_dipole_vacuum_debye"] = q.get("dipole_vacuum_debye")
    return d


def _treatment_list(treatments, reference) -> list:
    names = list(TREATMENTS) if treatments is None else list(dict.fromkeys(treatments))
    for n in names + [reference]:
        get_treatment(n)  # an unknown name is an error, not a skip
    if reference not in names:
        names.insert(0, reference)
    return names


def _options_for(name: str, term_options: dict) -> dict:
    mods = set(get_treatment(name).terms)
    return {m: o for m, o in term_options.items() if m in mods}


def compare(solv: SolvatedSystem, *, treatments: Optional[Sequence[str]] = None, reference: str = "classical",
            model: str = "ani1x", run_ps: float = 2.0, out, dt_fs: float = 1.0, equilibration_ps: float = 2.0,
            nve_ps: float = 5.0, threads: int = 2, report_interval: int = 10, progress: bool = True,
            threshold_kT_per_ns_per_dof: Optional[float] = None, sample_interval_steps: int = 20,
            term_options: Optional[dict] = None,
            minimize_max_iterations: int = MINIMIZE_MAX_ITERATIONS) -> Path:
    """Run treatments side by side from one start structure and write a comparison folder.

    Parameters
    ----------
    solv : SolvatedSystem; its ``positions`` are the common start structure
    treatments : names in :data:`mlbridge.treatments.TREATMENTS`, default all; the reference is
        added (first) when missing. An unknown name raises :class:`TreatmentError`.
    reference : treatment the region forces are compared against (default ``classical``)
    model : ML potential of the ``ml*`` treatments (ani1x, ani1ccx, ani2x)
    run_ps : time, ps, of the NVT sampling run per treatment
    out : folder to write (replaced atomically if it exists)
    dt_fs : timestep, fs, of the NVT run and the NVE check
    equilibration_ps, nve_ps : lengths, ps, of the NVE check's NVT equilibration and NVE run
    threads : CPU threads for OpenMM and torch
    report_interval : steps between energy samples of the NVE check
    progress : show progress bars
    threshold_kT_per_ns_per_dof : drift threshold, kT/ns per DOF (default
        :data:`mlbridge.drift.DRIFT_THRESHOLD_KT_PER_NS_PER_DOF`)
    sample_interval_steps : steps between frames of the NVT run
    term_options : {term module: {option: value}}, applied to every treatment that uses the
        module, e.g. {"qeq": {"mode": "rappe-goddard"}}; a module no listed treatment uses raises
        :class:`OptionError`
    minimize_max_iterations : int, default 200, L-BFGS iterations of the minimisation before the
        NVT run (tolerance 10 kJ/mol/nm); the NVE check starts from that minimised structure

    Returns
    -------
    Path of the folder (``comparison.json``, ``comparison.md``, ``energy.png``,
    ``torsions.png``, ``rdf.png``, ``speed.png``; see the module docstring).

    Raises
    ------
    TreatmentError for an unknown treatment; the reference's own build or run error when the
    reference cannot be built or run; OptionError for unused term options.
    """
    t_start = time.time()
    names = _treatment_list(treatments, reference)
    term_options = dict(term_options or {})
    used = {m for n in names for m in get_treatment(n).terms}
    unused = sorted(set(term_options) - used)
    if unused:
        raise OptionError(f"term options given for {unused}, which none of the treatments {names} uses "
                          f"(their terms: {sorted(used) or 'none'}).")
    threshold = DRIFT_THRESHOLD_KT_PER_NS_PER_DOF if threshold_kT_per_ns_per_dof is None else float(threshold_kT_per_ns_per_dof)
    out = Path(out)
    start = np.asarray(solv.positions, float)
    box = solv.box_vectors_nm()
    sites = observable_sites(solv)

    results: list = []
    for name in names:
        res = TreatmentComparison(name=name, summary=get_treatment(name).summary)
        results.append(res)
        try:
            res.built = apply_treatment(solv, name, model=model, term_options=_options_for(name, term_options))
        except (MlbridgeError, ImportError) as e:
            if name == reference:
                raise
            res.status, res.reason = "skipped", f"{type(e).__name__}: {e}"
            continue
        stage, t0 = "single point", time.perf_counter()

        def lap(next_stage):
            nonlocal stage, t0
            res.stage_seconds[stage.replace(" ", "_")] = time.perf_counter() - t0
            stage, t0 = next_stage, time.perf_counter()

        try:
            res.single_point = single_point(res.built, start, threads=threads)
            lap("NVT sampling")
            samp = sample_nvt(res.built, run_ps=run_ps, dt_fs=dt_fs, sample_interval_steps=sample_interval_steps,
                              threads=threads, progress=progress, minimize_max_iterations=minimize_max_iterations)
            res.run = structural_observables(samp, sites, start, box)
            res.run["run_ps"] = float(run_ps)
            lap("NVE check")
            # the check starts from the structure minimised above (minimising again only costs time)
            res.check = check_setup(replace(res.built, positions=samp.minimized_positions), dt_fs=dt_fs,
                                    equilibration_ps=equilibration_ps, nve_ps=nve_ps, threads=threads,
                                    report_interval=report_interval, progress=progress,
                                    threshold_kT_per_ns_per_dof=threshold, minimize=False)
            lap("done")
        except (MlbridgeError, openmm.OpenMMException) as e:
            if name == reference:
                raise
            res.status, res.reason = "failed", f"{stage}: {type(e).__name__}: {e}"
            res.check = None

    ref = next(r for r in results if r.name == reference)
    for r in results:
        if r.single_point:
            r.single_point.update(force_differences(r.single_point["region_forces_kjmol_nm"],
                                                    ref.single_point["region_forces_kjmol_nm"]))
    settings = dict(reference=reference, model=model, run_ps=run_ps, dt_fs=dt_fs, equilibration_ps=equilibration_ps,
                    nve_ps=nve_ps, threads=threads, report_interval_steps=report_interval,
                    sample_interval_steps=sample_interval_steps, temperature_k=TEMPERATURE_K,
                    friction_per_ps=FRICTION_PER_PS, threshold_kT_per_ns_per_dof=threshold,
                    minimize_max_iterations=int(minimize_max_iterations),
                    term_options=term_options)
    _write(out, solv, sites, results, settings, time.time() - t_start)
    for r in results:  # the built systems hold torch modules and tblite handles: drop them
        r.built = None
    return out


# ---------------------------------------------------------------------------------------
# output
# ---------------------------------------------------------------------------------------
def _f(x, fmt=".3g") -> str:
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "n/a"
    try:
        return format(x, fmt)
    except (TypeError, ValueError):
        return str(x)


def gather_warnings(results) -> list:
    """Every warning of every treatment, then the skipped and failed treatments with reasons."""
    w = [x for r in results for x in r.warnings]
    w += [f"{r.name}: {r.status}: {r.reason}" for r in results if r.status != "ok"]
    return w


def _system_info(solv: SolvatedSystem) -> dict:
    m = solv.metadata
    info = {k: m[k] for k in ("ligand_smiles", "n_waters", "box_shape", "nonbonded", "constraints", "cutoff_nm")
            if k in m}
    info.update(n_atoms=int(solv.n_atoms), n_region_atoms=len(solv.region), box_vectors_nm=solv.box_vectors_nm().tolist())
    if solv.ligand is not None:
        info.setdefault("ligand_smiles", getattr(solv.ligand, "smiles", None))
    return info


def side_by_side_table(results, reference: str) -> list:
    """Markdown lines: one column per treatment, one row per quantity."""
    cols = [r.name for r in results]
    lines = ["| quantity | " + " | ".join(f"`{c}`" for c in cols) + " |",
             "|---|" + "---|" * len(cols)]

    def row(label, fn):
        cells = []
        for r in results:
            try:
                cells.append(fn(r) if r.status == "ok" else "—")
            except (KeyError, TypeError, AttributeError):
                cells.append("—")
        lines.append(f"| {label} | " + " | ".join(cells) + " |")

    lines.append("| status | " + " | ".join(r.status if r.status == "ok" else f"**{r.status}**" for r in results) + " |")
    row("drift ± 2σ (kT/ns/DOF)", lambda r: f"{_f(r.check.fit.slope_kT_per_ns_per_dof)} "
        f"± {_f(r.check.drift_2sigma_kT_per_ns_per_dof, '.2g')} "
        f"({_DRIFT_CELL.get(_drift_status(r.check), _drift_status(r.check))})")
    row("ms/step", lambda r: _f(r.check.speed.ms_per_step, ".2f"))
    row("ns/day", lambda r: _f(r.check.speed.ns_per_day, ".2f"))
    row("classical part (ms/step)", lambda r: _f(r.check.speed.classical_ms_per_step, ".2f"))
    row("region terms (ms/step)", lambda r: ", ".join(f"{k} {_f(v, '.2f')}" for k, v in r.check.speed.terms_ms.items()) or "—")
    row("bridge overhead (ms/step)", lambda r: _f(r.check.speed.bridge_overhead_ms, ".2f") if r.check.speed.terms_ms else "—")
    row("waiting for region terms (ms/step)", lambda r: (_f(r.check.speed.wait_ms, ".2f") + ("" if r.check.speed.overlap else " (serial)"))
        if r.check.speed.terms_ms else "—")
    row(f"force RMS diff vs `{reference}` (kJ/mol/nm)", lambda r: _f(r.single_point["force_rms_diff_kjmol_nm"]))
    row(f"force max diff vs `{reference}` (kJ/mol/nm)", lambda r: _f(r.single_point["force_max_diff_kjmol_nm"]))
    row("potential-energy std along NVT, whole system (kJ/mol)", lambda r: _f(r.run["energy"]["potential_std_kjmol"]))
    row("region-term energy std along NVT (kJ/mol)", lambda r: ", ".join(
        f"{k} {_f(v)}" for k, v in r.run["energy"]["group_std_kjmol"].items() if k != "classical") or "—")
    row("RMSD from start, mean / max (nm)", lambda r: f"{_f(r.run['rmsd']['mean_nm'])} / {_f(r.run['rmsd']['max_nm'])}")
    row("H-bonds per frame, mean ± std (ligand→water + water→ligand)", lambda r: (
        f"{_f(r.run['hbonds']['total_mean'])} ± {_f(r.run['hbonds']['total_std'])} "
        f"({_f(r.run['hbonds']['ligand_donor_to_water_mean'])} + {_f(r.run['hbonds']['water_donor_to_ligand_mean'])})"))
    row("ANI ensemble spread, mean / max (kJ/mol)",
        lambda r: f"{_f(r.check.uncertainty['ensemble_std_kjmol_mean'])} / {_f(r.check.uncertainty['ensemble_std_kjmol_max'])}"
        if r.check.uncertainty else "—")
    row("QEq dipole, in water / vacuum (D)",
        lambda r: f"{_f(r.check.qeq['dipole_debye_mean'])} / {_f(r.check.qeq['dipole_vacuum_debye'])}" if r.has_qeq and r.check.qeq else "—")
    return lines


def _write(out: Path, solv, sites: Sites, results, settings: dict, elapsed_s: float) -> None:
    from . import plots
    with atomic_folder(out) as tmp:
        ok = [r for r in results if r.status == "ok"]
        warnings = gather_warnings(results)
        pngs = {"energy": "energy.png", "torsions": "torsions.png", "rdf": "rdf.png", "speed": "speed.png"}
        plots.plot_compare_energy(
            {r.name: (r.check.trace["Time (ps)"], r.check.trace["Total Energy (kJ/mole)"]) for r in ok},
            {r.name: (r.run["energy"]["time_ps"], r.run["energy"]["potential_minus_mean_kjmol"]) for r in ok},
            tmp / pngs["energy"])
        plots.plot_compare_torsions(
            list(sites.torsion_labels),
            {r.name: [(t["histogram_edges_deg"], t["histogram_density_per_deg"]) for t in r.run["torsions"]] for r in ok},
            tmp / pngs["torsions"])
        plots.plot_compare_rdfs(
            [x["site"] for x in ok[0].run["rdf"]] if ok else [],
            {r.name: [(x["r_nm"], x["g"]) for x in r.run["rdf"]] for r in ok},
            tmp / pngs["rdf"])
        plots.plot_compare_speed(
            {r.name: (r.check.speed.classical_ms_per_step if r.check.speed.terms_ms else r.check.speed.ms_per_step,
                      dict(r.check.speed.terms_ms),
                      r.check.speed.bridge_overhead_ms if r.check.speed.terms_ms else 0.0) for r in ok},
            tmp / pngs["speed"], threads=settings["threads"])

        data = {
            "title": "mlbridge comparison of treatments",
            "mlbridge_version": __version__,
            "elapsed_s": elapsed_s,
            "not_comparable": NOT_COMPARABLE,
            "settings": settings,
            "system": _system_info(solv),
            "warnings": warnings,
            "sites": {"torsions": [{"label": l, "atoms": list(q)} for l, q in zip(sites.torsion_labels, sites.torsions)],
                      "rdf_polar_atoms": [{"label": l, "atom": a} for l, a in zip(sites.polar_labels, sites.polar)],
                      "ligand_donors": [list(p) for p in sites.ligand_donors],
                      "ligand_acceptors": list(sites.ligand_acceptors),
                      "n_water_oxygens": len(sites.water_oxygens), "notes": list(sites.notes)},
            "criteria": {
                "force_diff": "per-atom norm |F_i - F_i^ref| over the region atoms at the start structure; "
                              "RMS = sqrt(mean_i |dF_i|^2), max = max_i |dF_i|; total force of all force groups",
                "torsions": "rotatable_torsions: RDKit strict rotatable-bond SMARTS + terminal X-H rotors; "
                            f"histograms of {TORSION_BINS} bins over [-180, 180) deg, density 1/deg",
                "rdf": f"ligand N/O to water O, minimum image, ideal-gas normalisation, bins {RDF_BIN_NM} nm",
                "hbonds": f"r(D-A) < {obs.HBOND_DISTANCE_NM} nm and angle H-D-A < {obs.HBOND_ANGLE_DEG} deg (gmx hbond default)",
                "rmsd": "ligand heavy atoms, made whole, Kabsch superposition on the common start structure, nm",
                "energy": "potential energy along the NVT run minus the treatment's own mean, kJ/mol",
            },
            "plots": pngs,
            "treatments": {r.name: r.to_dict() for r in results},
        }
        (tmp / "comparison.json").write_text(json.dumps(_strict(data), indent=2, default=_jsonable, allow_nan=False))
        (tmp / "comparison.md").write_text("\n".join(_markdown(solv, sites, results, settings, warnings, pngs)))
        checks = [r.check for r in results if r.check is not None]
        if checks:  # the per-treatment NVE check report (summary.json, report.md, energy PNGs)
            from .report import write_check_report
            write_check_report(checks, tmp / "check", title="mlbridge setup check: NVE drift and speed per treatment")


def _strict(o):
    """The data with NaN and infinities as None (null), so the JSON is strict."""
    if isinstance(o, dict):
        return {k: _strict(v) for k, v in o.items()}
    if isinstance(o, (list, tuple)):
        return [_strict(v) for v in o]
    if isinstance(o, np.ndarray):
        return _strict(o.tolist())
    if isinstance(o, (float, np.floating)):
        return float(o) if math.isfinite(o) else None
    if isinstance(o, np.integer):
        return int(o)
    return o


def _markdown(solv, sites, results, settings, warnings, pngs) -> list:
    ref = settings["reference"]
    lines = ["# mlbridge: treatments side by side", ""]
    if warnings:
        lines += ["**Warnings**", ""] + [f"- {w}" for w in warnings] + [""]
    else:
        lines += ["No warnings: every treatment ran and stayed within the drift and uncertainty thresholds.", ""]
    lines += [f"**{NOT_COMPARABLE}**", ""]
    info = _system_info(solv)
    lines += ["System: " + ", ".join(f"{k} {info[k]}" for k in ("ligand_smiles", "n_atoms", "n_waters", "box_shape")
                                     if info.get(k) is not None), ""]
    lines += [f"Every treatment starts from the same structure. Forces are compared at that structure against "
              f"`{ref}`. Then: minimise, NVT {settings['run_ps']} ps at {settings['temperature_k']} K "
              f"(Langevin, {settings['friction_per_ps']}/ps, dt {settings['dt_fs']} fs, a frame every "
              f"{settings['sample_interval_steps']} steps) for the structural observables; then the NVE check "
              f"(NVT {settings['equilibration_ps']} ps, NVE {settings['nve_ps']} ps, {settings['threads']} threads). "
              f"Model of the ml* treatments: {settings['model']}.", ""]
    lines += side_by_side_table(results, ref) + [""]
    skipped = [r for r in results if r.status != "ok"]
    if skipped:
        lines += ["## Skipped or failed treatments", ""] + [f"- `{r.name}` ({r.status}): {r.reason}" for r in skipped] + [""]
    ok = [r for r in results if r.status == "ok"]
    lines += ["## Energies at the start structure (kJ/mol, by force group)", "",
              "Each number has its own reference; read differences *within* a column only.", "",
              "| treatment | energy per force group |", "|---|---|"]
    for r in ok:
        lines.append(f"| `{r.name}` | " + "; ".join(f"{g['group']} {g['term']}: {_f(g['energy_kjmol'], '.6g')}"
                                                      for g in r.single_point["energy_groups"]) + " |")
    lines.append("")
    if sites.torsion_labels:
        lines += ["## Torsions (circular mean along the run, degrees; start structure in brackets)", "",
                  "| torsion | " + " | ".join(f"`{r.name}`" for r in ok) + " |", "|---|" + "---|" * len(ok)]
        for q, lab in enumerate(sites.torsion_labels):
            lines.append(f"| {lab} | " + " | ".join(
                f"{_f(r.run['torsions'][q]['circular_mean_deg'], '.0f')} ({_f(r.run['torsions'][q]['start_deg'], '.0f')})"
                for r in ok) + " |")
        lines.append("")
    if ok and ok[0].run.get("rdf"):
        lines += ["## Ligand polar atom - water O g(r): first peak, nm (height)", "",
                  "| site | " + " | ".join(f"`{r.name}`" for r in ok) + " |", "|---|" + "---|" * len(ok)]
        for k, x in enumerate(ok[0].run["rdf"]):
            lines.append(f"| {x['site']} | " + " | ".join(
                f"{_f(r.run['rdf'][k]['first_peak_r_nm'])} ({_f(r.run['rdf'][k]['first_peak_g'])})" for r in ok) + " |")
        lines.append("")
    lines += ["## Notes", "",
              "- Force differences: per-atom norm of the total-force difference on the region atoms at the start "
              "structure; RMS over atoms and maximum. The reference's difference is 0 by definition.",
              "- Potential-energy std: fluctuation of each treatment's potential energy about its own mean along "
              "the NVT run (a relative energy, comparable across treatments; the absolute mean is not).",
              f"- H-bonds: geometric, r(D-A) < {obs.HBOND_DISTANCE_NM} nm and angle H-D-A < {obs.HBOND_ANGLE_DEG} deg; "
              "ligand donors to water O plus water O-H to ligand N/O acceptors.",
              "- RMSD: ligand heavy atoms after Kabsch superposition on the common start structure.",
              "- Short runs sample little: torsion barriers and solvation shells need nanoseconds; read the "
              "distributions as a first look.",
              "- Timings depend on this machine's load; overhead = total - classical part - region terms. "
              "Region terms run in a worker thread while OpenMM computes the classical forces, so a negative "
              "overhead is region-term time hidden behind the classical part (MLBRIDGE_SERIAL_TERMS=1 runs "
              "them one after the other instead)."]
    for r in ok:
        for t in r.check.metadata.get("terms", []):
            if t.get("module") == "qeq":
                lines.append(f"- `{r.name}`: QEq embedding within {t.get('cutoff_nm')} nm; the region-water "
                             "Coulomb beyond that cutoff is dropped.")
    lines += [f"- {n}" for n in sites.notes]
    lines += ["", "## Plots", "",
              f"![NVE total energy and NVT potential-energy fluctuation]({pngs['energy']})", "",
              f"![torsion distributions]({pngs['torsions']})", "",
              f"![ligand polar atom - water O radial distribution]({pngs['rdf']})", "",
              f"![speed breakdown]({pngs['speed']})", ""]
    return lines
