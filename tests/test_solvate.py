"""Solvation: padding, neutrality, water density, octahedron, errors."""
import numpy as np
import openmm
import pytest

from mlbridge.errors import LigandInputError
from mlbridge.ligand import from_smiles
from mlbridge.solvate import achieved_padding, solvate

#: density of liquid water at 298 K and 1 atm, g/cm3 (handbook value, CRC Handbook)
WATER_DENSITY_298K = 0.997


def water_density(solv):
    return solv.water_count() * 18.015 / 6.02214076e23 / (solv.box_volume_nm3() * 1e-21)


def total_charge(system):
    nb = next(f for f in system.getForces() if isinstance(f, openmm.NonbondedForce))
    return sum(nb.getParticleParameters(i)[0]._value for i in range(nb.getNumParticles()))


def test_cubic_box_padding_neutral_density(solvated):
    box = solvated.box_vectors_nm()
    assert np.allclose(box, np.diag(np.diag(box))) and np.ptp(np.diag(box)) < 1e-9  # a cube
    region = solvated.positions[list(solvated.region)]
    assert achieved_padding(region, box) >= 1.0 - 0.02  # requested 1.0 nm; 0.02 nm: barostat's box fluctuation
    assert abs(total_charge(solvated.system)) < 1e-5
    assert water_density(solvated) == pytest.approx(WATER_DENSITY_298K, rel=0.05)
    assert solvated.metadata["constraints"].startswith("HBonds")
    assert solvated.metadata["built_for_timestep_fs"] == 2.0


def test_octahedron_charged_ligand_with_salt(demo_ligand):
    lig = from_smiles("C[NH3+]", name="MAM")
    solv = solvate(lig, padding=1.0, box_shape="octahedron", salt_molar=0.15)
    box = solv.box_vectors_nm()
    assert box[1, 0] != 0 and box[2, 1] != 0  # triclinic reduced form
    a = np.linalg.norm(box, axis=1)
    assert np.allclose(a, a[0], rtol=1e-6)  # truncated octahedron: three equal vectors
    assert abs(total_charge(solv.system)) < 1e-5  # neutralised by one Cl-
    ions = solv.metadata["ions"]
    expected_pairs = round(0.15 * solv.water_count() / 55.34)
    assert ions["Cl-"] == ions["Na+"] + 1 and abs(ions["Na+"] - expected_pairs) <= 1
    assert achieved_padding(solv.positions[list(solv.region)], box) >= 0.98
    assert water_density(solv) == pytest.approx(WATER_DENSITY_298K, rel=0.05)


def test_padding_below_cutoff_is_refused(demo_ligand, demo_params):
    with pytest.raises(LigandInputError, match="padding 0.5 nm is below the cutoff"):
        solvate(demo_ligand, padding=0.5, params=demo_params)
    with pytest.raises(LigandInputError, match="box_shape"):
        solvate(demo_ligand, box_shape="sphere", params=demo_params)
