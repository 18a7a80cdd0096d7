"""GAFF2/AM1-BCC parameters: OpenMM vs sander on the same prmtop, charges, and the cache."""
import re
import subprocess

import numpy as np
import openmm
import openmm.app as app
import openmm.unit as unit
import pytest

from mlbridge.ligand import from_smiles
from mlbridge.parameters import amber_tool, parametrize, vacuum_topology
from mlbridge.units import KCAL_KJ

from conftest import DEMO_SMILES

SANDER_MDIN = """single point energy, vacuum, no cutoff
 &cntrl
  imin=1, maxcyc=0, ntb=0, igb=0, cut=999.0, ntpr=1, ntx=1,
 /
"""


def sander_energies(prmtop, inpcrd, workdir):
    (workdir / "mdin").write_text(SANDER_MDIN)
    subprocess.run([amber_tool("sander"), "-O", "-i", "mdin", "-o", "mdout", "-p", str(prmtop),
                    "-c", str(inpcrd), "-r", "restrt"], cwd=workdir, check=True, capture_output=True)
    text = (workdir / "mdout").read_text()
    block = text[text.index("FINAL RESULTS"):] if "FINAL RESULTS" in text else text
    out = {}
    for key in ("BOND", "ANGLE", "DIHED", "VDWAALS", "EEL", "1-4 VDW", "1-4 EEL"):
        m = re.search(re.escape(key) + r"\s*=\s*(-?\d+\.\d+)", block)
        out[key] = float(m.group(1))
    return out  # kcal/mol


def openmm_terms(prmtop, inpcrd):
    top = app.AmberPrmtopFile(str(prmtop))
    crd = app.AmberInpcrdFile(str(inpcrd))
    system = top.createSystem(nonbondedMethod=app.NoCutoff, constraints=None, rigidWater=False)
    for k, f in enumerate(system.getForces()):
        f.setForceGroup(k)

    def group_energy(sys_, cls):
        ctx = openmm.Context(sys_, openmm.VerletIntegrator(0.001), openmm.Platform.getPlatformByName("Reference"))
        ctx.setPositions(crd.positions)
        g = next(f.getForceGroup() for f in sys_.getForces() if isinstance(f, cls))
        e = ctx.getState(getEnergy=True, groups={g}).getPotentialEnergy()
        return e.value_in_unit(unit.kilocalorie_per_mole)

    out = {"bond": group_energy(system, openmm.HarmonicBondForce),
           "angle": group_energy(system, openmm.HarmonicAngleForce),
           "dihedral": group_energy(system, openmm.PeriodicTorsionForce)}
    # split the NonbondedForce into LJ (charges off) and Coulomb (epsilon off), 1-4 pairs included
    for label, keep_q in (("vdw", False), ("elec", True)):
        s = openmm.XmlSerializer.clone(system)
        nb = next(f for f in s.getForces() if isinstance(f, openmm.NonbondedForce))
        for i in range(nb.getNumParticles()):
            q, sig, eps = nb.getParticleParameters(i)
            nb.setParticleParameters(i, q if keep_q else 0.0, sig, eps if not keep_q else 0.0)
        for k in range(nb.getNumExceptions()):
            i, j, qq, sig, eps = nb.getExceptionParameters(k)
            nb.setExceptionParameters(k, i, j, qq if keep_q else 0.0, sig, eps if not keep_q else 0.0)
        out[label] = group_energy(s, openmm.NonbondedForce)
    return out


@pytest.mark.parametrize("smiles", [DEMO_SMILES, "C[C@H](O)C(=O)NC"])
def test_openmm_matches_sander_term_by_term(smiles, tmp_path):
    """Same prmtop, vacuum, no cutoff: each term within 0.01 kcal/mol (the issue's bound;
    sander prints 4 decimals, and OpenMM's Reference platform is double precision)."""
    lig = from_smiles(smiles)
    params = parametrize(lig)
    prmtop, inpcrd = vacuum_topology(lig, params, tmp_path)
    ref = sander_energies(prmtop, inpcrd, tmp_path)
    omm = openmm_terms(prmtop, inpcrd)
    pairs = {"bond": ref["BOND"], "angle": ref["ANGLE"], "dihedral": ref["DIHED"],
             "vdw": ref["VDWAALS"] + ref["1-4 VDW"], "elec": ref["EEL"] + ref["1-4 EEL"]}
    for term, value in pairs.items():
        assert omm[term] == pytest.approx(value, abs=0.01), (term, omm[term], value)
    assert abs(pairs["dihedral"]) > 0.1 and abs(pairs["elec"]) > 1.0  # the terms are not trivially zero


def test_charges_sum_to_net_charge_and_cache_skips_sqm(tmp_path, monkeypatch):
    lig = from_smiles("C[NH3+]")
    first = parametrize(lig, cache_dir=tmp_path)
    assert not first.from_cache
    assert first.charges.sum() == pytest.approx(1.0, abs=1e-10)
    assert set(first.atom_types) <= {"c3", "n4", "nz", "hn", "hx", "hc", "h1"}  # GAFF2 names sp3 N+ "nz"

    # the second call must not run antechamber/sqm at all
    import mlbridge.parameters as P
    def fail(*a, **k):
        raise AssertionError("sqm/antechamber ran although the cache holds this molecule")
    monkeypatch.setattr(P, "_run_antechamber", fail)
    again = parametrize(lig, cache_dir=tmp_path)
    assert again.from_cache
    assert np.array_equal(again.charges, first.charges)


def test_cache_maps_a_reordered_molecule(tmp_path, demo_ligand):
    from rdkit import Chem
    from mlbridge.ligand import Ligand
    base = parametrize(demo_ligand, cache_dir=tmp_path)
    order = list(reversed(range(demo_ligand.n_atoms)))
    shuffled = Ligand(mol=Chem.RenumberAtoms(demo_ligand.mol, order), name="LIG")
    again = parametrize(shuffled, cache_dir=tmp_path)
    assert again.from_cache
    assert np.allclose(again.charges, base.charges[order])
    assert again.atom_types == tuple(base.atom_types[i] for i in order)


def test_sqm_failure_is_translated(tmp_path):
    from mlbridge.errors import ParametrizationError
    from mlbridge.ligand import Ligand
    lig = from_smiles("CC(=O)[O-]")
    # lie about the charge: an odd electron count makes sqm's closed-shell AM1 fail
    from rdkit import Chem
    m = Chem.RWMol(lig.mol)
    m.GetAtomWithIdx(3).SetFormalCharge(0)
    m.GetAtomWithIdx(3).SetNoImplicit(True)
    bad = Ligand(mol=m.GetMol(), name="LIG")
    with pytest.raises(ParametrizationError, match=r"antechamber failed .* log is"):
        parametrize(bad, cache_dir=tmp_path)
