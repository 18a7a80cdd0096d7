"""The same battery for every registered treatment: builds, finite energy, finite-difference
forces, serializes and reloads with the same energy."""
import numpy as np
import openmm
import openmm.unit as unit
import pytest

from mlbridge.build import BuiltSystem, apply_treatment
from mlbridge.treatments import TREATMENTS

#: precise settings for derivative tests: float64 ANI, tight xTB SCF
PRECISE = {"ani": {"precision": "float64"}, "xtb": {"accuracy": 1e-4}}


def smooth(system):
    """Copy with a smooth classical part (LJ switch, tight Ewald): see test_ml_region."""
    s = openmm.XmlSerializer.clone(system)
    nb = next(f for f in s.getForces() if isinstance(f, openmm.NonbondedForce))
    nb.setUseSwitchingFunction(True)
    nb.setSwitchingDistance(0.8)
    nb.setEwaldErrorTolerance(1e-7)
    return s


def state(ctx, x, forces=False):
    ctx.setPositions(x * unit.nanometer)
    st = ctx.getState(getEnergy=True, getForces=forces)
    e = st.getPotentialEnergy().value_in_unit(unit.kilojoule_per_mole)
    if not forces:
        return e
    return e, np.array(st.getForces(asNumpy=True).value_in_unit(unit.kilojoule_per_mole / unit.nanometer))


@pytest.mark.parametrize("name", list(TREATMENTS))
def test_treatment_battery(name, solvated, tmp_path):
    t = TREATMENTS[name]
    opts = {m: PRECISE[m] for m in t.terms if m in PRECISE}
    built = apply_treatment(solvated, name, term_options=opts)
    groups = built.force_groups
    assert groups[0] == "classical" and len(groups) == 1 + len(t.terms)
    ctx = openmm.Context(smooth(built.system), openmm.VerletIntegrator(0.001),
                         openmm.Platform.getPlatformByName("Reference"))
    x0 = built.positions
    e0, f = state(ctx, x0, forces=True)
    assert np.isfinite(e0) and np.all(np.isfinite(f))
    region = list(built.region)
    d = np.linalg.norm(x0[:, None, :] - x0[None, region, :], axis=-1).min(axis=1)
    d[region] = np.inf
    h = 1e-4  # nm
    for i in (region[1], region[9], int(np.argmin(d))):  # two region atoms, the nearest water atom
        for k in range(3):
            xp, xm = x0.copy(), x0.copy()
            xp[i, k] += h
            xm[i, k] -= h
            fd = -(state(ctx, xp) - state(ctx, xm)) / (2 * h)
            assert fd == pytest.approx(f[i, k], abs=0.5, rel=2e-3), (name, i, k, fd, f[i, k])
    # serializes, reloads (the region terms are rebuilt from their spec) and gives the same energy
    built.save(tmp_path / "sys")
    again = BuiltSystem.load(tmp_path / "sys")
    ctx2 = openmm.Context(smooth(again.system), openmm.VerletIntegrator(0.001),
                          openmm.Platform.getPlatformByName("Reference"))
    assert state(ctx2, again.positions) == pytest.approx(e0, abs=1e-3)
