"""build(): the BuiltSystem, atomic saving, prepared systems and region selection."""
import json
import subprocess
from pathlib import Path

import numpy as np
import openmm
import openmm.app as app
import openmm.unit as unit
import pytest

from mlbridge.build import BuiltSystem, apply_treatment
from mlbridge.errors import InputFileNotFoundError, LigandInputError, PreparedSystemError, TreatmentError
from mlbridge.parameters import amber_tool, write_mol2
from mlbridge.prepared import load_prepared


def energy(system, positions):
    ctx = openmm.Context(openmm.XmlSerializer.clone(system), openmm.VerletIntegrator(0.001),
                         openmm.Platform.getPlatformByName("CPU"), {"Threads": "1"})
    ctx.setPositions(positions * unit.nanometer)
    return ctx.getState(getEnergy=True).getPotentialEnergy().value_in_unit(unit.kilojoule_per_mole)


def test_classical_build_saves_and_loads(solvated, tmp_path):
    built = apply_treatment(solvated, "classical")
    assert built.treatment == "classical" and len(built.region) == 20
    assert built.metadata["built_for_timestep_fs"] == 2.0 and "HBonds" in built.metadata["constraints"]
    out = built.save(tmp_path / "sys")
    assert sorted(p.name for p in out.iterdir()) == ["metadata.json", "start-positions.npy", "start.pdb", "system.xml"]
    meta = json.loads((out / "metadata.json").read_text())
    assert meta["region"] == list(built.region) and meta["treatment"] == "classical"
    again = BuiltSystem.load(out)
    assert energy(again.system, again.positions) == pytest.approx(energy(built.system, built.positions), abs=0.05)
    assert not list(tmp_path.glob(".*tmp*"))  # no temporary folder left


def test_failed_save_leaves_nothing_half_written(solvated, tmp_path, monkeypatch):
    built = apply_treatment(solvated, "classical")
    target = tmp_path / "sys"
    built.save(target)
    before = {p.name: p.read_bytes() for p in target.iterdir()}

    def boom(*a, **k):
        raise RuntimeError("disk full")
    monkeypatch.setattr(app.PDBFile, "writeFile", boom)
    with pytest.raises(RuntimeError, match="disk full"):
        built.save(target)
    with pytest.raises(RuntimeError, match="disk full"):
        built.save(tmp_path / "new")
    assert not (tmp_path / "new").exists()
    assert {p.name: p.read_bytes() for p in target.iterdir()} == before  # old folder intact
    assert [p.name for p in tmp_path.iterdir()] == ["sys"]


def test_cli_build_with_bad_input_writes_no_folder(tmp_path, capsys):
    from mlbridge.cli import main
    rc = main(["build", "C1CC(", "--out", str(tmp_path / "x")])
    assert rc == 2 and not (tmp_path / "x").exists()
    assert "could not parse SMILES" in capsys.readouterr().err


def test_unknown_treatment(solvated):
    with pytest.raises(TreatmentError, match="unknown treatment 'qm'.*classical, ml"):
        apply_treatment(solvated, "qm")


@pytest.fixture(scope="module")
def amber_prepared(tmp_path_factory, demo_ligand, demo_params):
    """An AMBER system prepared outside mlbridge (tleap's own solvateBox)."""
    d = tmp_path_factory.mktemp("amber")
    write_mol2(demo_ligand, demo_params, d / "lig.mol2", resname="MOL")
    (d / "lig.frcmod").write_text(demo_params.frcmod)
    (d / "leap.in").write_text("source leaprc.gaff2\nsource leaprc.water.tip3p\nMOL = loadmol2 lig.mol2\n"
                               "loadamberparams lig.frcmod\nsolvateBox MOL TIP3PBOX 10.0\n"
                               "saveamberparm MOL sys.prmtop sys.inpcrd\nquit\n")
    subprocess.run([amber_tool("tleap"), "-f", "leap.in"], cwd=d, check=True, capture_output=True)
    return d


def test_prepared_amber_by_residue_and_indices(amber_prepared):
    d = amber_prepared
    solv = load_prepared(d / "sys.prmtop", coordinates=d / "sys.inpcrd", region_residue="MOL")
    assert solv.region == tuple(range(20)) and solv.net_charge == 0
    by_idx = load_prepared(d / "sys.prmtop", coordinates=d / "sys.inpcrd", region_atoms="0-19")
    assert by_idx.region == solv.region
    with pytest.raises(PreparedSystemError, match=r"no residue named 'LIG'.*residue names present: HOH, MOL"):
        load_prepared(d / "sys.prmtop", coordinates=d / "sys.inpcrd", region_residue="LIG")
    with pytest.raises(PreparedSystemError, match="not an integer"):
        load_prepared(d / "sys.prmtop", coordinates=d / "sys.inpcrd", region_atoms="0-5")
    with pytest.raises(InputFileNotFoundError, match="does not exist"):
        load_prepared(d / "nope.prmtop", coordinates=d / "sys.inpcrd", region_residue="MOL")
    built = apply_treatment(solv, "classical")
    assert np.isfinite(energy(built.system, built.positions))


def test_prepared_gromacs_and_openmm_xml(amber_prepared, tmp_path):
    import parmed
    d = amber_prepared
    s = parmed.load_file(str(d / "sys.prmtop"), str(d / "sys.inpcrd"))
    s.save(str(tmp_path / "sys.top"), format="gromacs")
    s.save(str(tmp_path / "sys.gro"))
    gmx = load_prepared(tmp_path / "sys.top", coordinates=tmp_path / "sys.gro", region_residue="MOL")
    amb = load_prepared(d / "sys.prmtop", coordinates=d / "sys.inpcrd", region_residue="MOL")
    assert gmx.region == amb.region
    # same physics through both readers (gro has 1e-3 nm precision: compare loosely)
    assert energy(gmx.system, amb.positions) == pytest.approx(energy(amb.system, amb.positions), rel=1e-3)
    built = apply_treatment(amb, "classical")
    built.save(tmp_path / "omm")
    xml = load_prepared(tmp_path / "omm" / "system.xml", coordinates=tmp_path / "omm" / "start.pdb",
                        region_residue="MOL")
    assert xml.region == amb.region
