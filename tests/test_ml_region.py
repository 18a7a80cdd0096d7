"""The `ml` treatment in OpenMM: agreement with torchani, finite differences, exact bookkeeping,
periodic invariance, domain checks."""
import numpy as np
import openmm
import openmm.app as app
import openmm.unit as unit
import pytest

from mlbridge.build import apply_treatment
from mlbridge.errors import DomainError
from mlbridge.parameters import vacuum_topology
from mlbridge.terms.ani import stock_energy_forces, stock_ensemble


from conftest import context_energy_forces as energy_forces  # noqa: E402
from conftest import cpu_or_reference_context as context  # noqa: E402


@pytest.fixture(scope="module")
def ml64(solvated):
    """ml with the float64 evaluation (finite differences need double precision everywhere)."""
    return apply_treatment(solvated, "ml", term_options={"ani": {"precision": "float64"}})


def test_region_force_equals_torchani(solvated, ml64):
    region = list(solvated.region)
    z = [a.element.atomic_number for a in solvated.topology.atoms() if a.index in set(region)]
    x = solvated.positions[region]
    e64_ref, f64_ref, _ = stock_energy_forces(stock_ensemble("ani1x", "float64"), z, x)
    # float64: the region force inside OpenMM equals torchani's float64 model to 1e-6 relative
    ctx = context(ml64.system, "CPU")
    e, f = energy_forces(ctx, ml64.positions, groups={1})
    assert e == pytest.approx(e64_ref, rel=1e-6)
    assert np.abs(f[region] - f64_ref).max() <= 1e-6 * np.abs(f64_ref).max()
    others = np.setdiff1d(np.arange(ml64.system.getNumParticles()), region)
    assert np.all(f[others] == 0)
    # float32 (the default): same energy to 1e-6; forces no further from the float64 reference
    # than torchani's own float32 model is (both carry float32 rounding, in different orders,
    # ~1e-5 of the largest force component; a fixed bound on their difference was flaky)
    built = apply_treatment(solvated, "ml")
    ctx = context(built.system, "CPU")
    e, f = energy_forces(ctx, built.positions, groups={1})
    e_ref, f_ref, _ = stock_energy_forces(stock_ensemble("ani1x", "float32"), z, x)
    assert e == pytest.approx(e_ref, rel=1e-6)
    stock_err = np.abs(f_ref - f64_ref).max()
    print(f"float32 force error vs float64: ours {np.abs(f[region] - f64_ref).max():.2e}, torchani {stock_err:.2e}")
    assert np.abs(f[region] - f64_ref).max() <= 2.0 * stock_err + 1e-6 * np.abs(f64_ref).max()
    assert np.all(f[list(others)] == 0)


def test_finite_differences_full_system(ml64, solvated):
    """Central differences of the total energy (Reference platform, double) vs the forces, on
    region atoms and on the water atoms nearest the ligand."""
    system = openmm.XmlSerializer.clone(ml64.system)
    # A hard real-space cutoff makes the energy jump when a pair crosses it (for PME at
    # mlbridge's ewaldErrorTolerance, ~1e-4 kJ/mol per pair: tens of kJ/mol/nm over a 2e-4 nm step).
    # For the derivative test only, make the classical part smooth: LJ switch 0.8-0.9 nm and a
    # tight Ewald tolerance; the region force and the bookkeeping are unchanged.
    nb = next(f for f in system.getForces() if isinstance(f, openmm.NonbondedForce))
    nb.setUseSwitchingFunction(True)
    nb.setSwitchingDistance(0.8)
    nb.setEwaldErrorTolerance(1e-7)
    ctx = context(system)
    x0 = ml64.positions
    _, f = energy_forces(ctx, x0)
    region = list(ml64.region)
    d = np.linalg.norm(x0[:, None, :] - x0[None, region, :], axis=-1).min(axis=1)
    d[region] = np.inf
    water = list(np.argsort(d)[:3])
    h = 1e-4  # nm
    for i in [region[0], region[7], region[15]] + water:
        for k in range(3):
            xp, xm = x0.copy(), x0.copy()
            xp[i, k] += h
            xm[i, k] -= h
            ep, _ = energy_forces(ctx, xp)
            em, _ = energy_forces(ctx, xm)
            fd = -(ep - em) / (2 * h)
            # 0.5 kJ/mol/nm absolute + 1e-3 relative: O(h^2) error and the PME grid's interpolation
            assert fd == pytest.approx(f[i, k], abs=0.5, rel=1e-3), (i, k, fd, f[i, k])


def test_bookkeeping_is_exact(ml64, solvated, demo_ligand, demo_params, tmp_path):
    """U_ml(x) - U_ANI(x_R) == U_classical(x) - U_classical,RR(x_R), to 1e-3 kJ/mol."""
    x = solvated.positions
    region = list(solvated.region)
    # PME's grid approximates the reciprocal part of the R-R pairs in U_classical but the
    # excluded pairs' part is subtracted analytically in U_ml: at ewaldErrorTolerance 1e-4 that
    # differs by ~1e-2 kJ/mol. Both systems get a tight tolerance for this test.
    def tight(system):
        s = openmm.XmlSerializer.clone(system)
        next(f for f in s.getForces() if isinstance(f, openmm.NonbondedForce)).setEwaldErrorTolerance(1e-7)
        return s
    ctx = context(tight(ml64.system))
    e_ml, _ = energy_forces(ctx, x)
    e_ani, _ = energy_forces(ctx, x, groups={1})  # the ANI force alone (its torchani agreement: above)
    e_cl, _ = energy_forces(context(tight(solvated.system)), x)
    prmtop, _ = vacuum_topology(demo_ligand, demo_params, tmp_path)
    vac = app.AmberPrmtopFile(str(prmtop)).createSystem(nonbondedMethod=app.NoCutoff, constraints=None)
    e_vac, _ = energy_forces(context(vac), x[region])
    assert (e_ml - e_ani) == pytest.approx(e_cl - e_vac, abs=1e-3)


def test_energy_invariant_across_periodic_boundary(ml64):
    ctx = context(openmm.XmlSerializer.clone(ml64.system))
    x = ml64.positions.copy()
    e0, _ = energy_forces(ctx, x)
    box = np.array([list(v.value_in_unit(unit.nanometer)) for v in ml64.system.getDefaultPeriodicBoxVectors()])
    region = list(ml64.region)
    # move the ligand so it straddles a face, then wrap half of its atoms into the box
    shift = np.array([box[0, 0] / 2 - x[region, 0].mean(), 0, 0]) + 0.0
    y = x + shift
    e_shift, _ = energy_forces(ctx, y)
    y[region[::2]] -= box[0]
    e_wrap, _ = energy_forces(ctx, y)
    e_ani_wrap, _ = energy_forces(ctx, y, groups={1})
    e_ani0, _ = energy_forces(ctx, x, groups={1})
    # wrapping atoms by a box vector must change nothing (the region force unwraps, exceptions
    # use minimum image): to 1e-4 kJ/mol on a ~1e6 kJ/mol total
    assert e_wrap == pytest.approx(e_shift, abs=1e-4)
    assert e_ani_wrap == pytest.approx(e_ani0, abs=1e-3)  # ANI is translation invariant
    # translating everything changes only PME's grid interpolation error (tolerance 1e-4)
    assert e_shift == pytest.approx(e0, abs=0.1)


def _vacuum_solvated(smiles, name="LIG"):
    from mlbridge.ligand import from_smiles
    from mlbridge.parameters import parametrize
    from mlbridge.solvate import SolvatedSystem
    import tempfile
    from pathlib import Path
    lig = from_smiles(smiles, name=name)
    params = parametrize(lig)
    with tempfile.TemporaryDirectory() as d:
        prmtop, _ = vacuum_topology(lig, params, Path(d))
        top = app.AmberPrmtopFile(str(prmtop))
        system = top.createSystem(nonbondedMethod=app.NoCutoff)
    return SolvatedSystem(system=system, topology=top.topology, positions=lig.positions_nm,
                          region=tuple(range(lig.n_atoms)), region_charges=params.charges,
                          net_charge=lig.net_charge, ligand=lig)


def test_domain_checks_refuse_elements_and_charges():
    with pytest.raises(DomainError, match=r"ani1x supports only .*atom\(s\) 1 \(S\).*'ani2x'.*'xtb'"):
        apply_treatment(_vacuum_solvated("CS"), "ml")
    with pytest.raises(DomainError, match=r"(?s)net charge.*\+?1"):
        apply_treatment(_vacuum_solvated("C[NH3+]"), "ml")
