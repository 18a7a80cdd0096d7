"""Tests of the GFN2-xTB region term (mlbridge.terms.xtb) against tblite called directly."""
import time

import numpy as np
import pytest

tblite_interface = pytest.importorskip("tblite.interface")
Chem = pytest.importorskip("rdkit.Chem")
from rdkit.Chem import AllChem  # noqa: E402

from mlbridge.errors import DomainError, OptionError, SCFConvergenceError  # noqa: E402
from mlbridge.terms.base import RegionInfo, build_term  # noqa: E402
from mlbridge.terms.xtb import make_term  # noqa: E402
from mlbridge.units import BOHR_NM, HARTREE_KJMOL, HARTREE_PER_BOHR_TO_KJMOL_PER_NM  # noqa: E402

ACETAMINOPHEN = "CC(=O)Nc1ccc(O)cc1"


def _region_from_mol(mol, net_charge=0):
    return RegionInfo(
        symbols=tuple(a.GetSymbol() for a in mol.GetAtoms()),
        atomic_numbers=tuple(a.GetAtomicNum() for a in mol.GetAtoms()),
        net_charge=net_charge,
    )


@pytest.fixture(scope="module")
def acetaminophen():
    """20-atom ligand, ETKDG geometry with a fixed seed (not minimised: sizeable forces)."""
    mol = Chem.AddHs(Chem.MolFromSmiles(ACETAMINOPHEN))
    assert AllChem.EmbedMolecule(mol, randomSeed=7) == 0
    x_nm = mol.GetConformer().GetPositions() * 0.1
    return _region_from_mol(mol), x_nm


def _direct(region, x_nm, **settings):
    """GFN2-xTB through a fresh tblite Calculator: energy (hartree), gradient (hartree/bohr)."""
    calc = tblite_interface.Calculator(
        "GFN2-xTB", np.array(region.atomic_numbers), x_nm / BOHR_NM,
        charge=float(region.net_charge), uhf=0,
    )
    calc.set("verbosity", 0)
    for key, value in settings.items():
        calc.set(key, value)
    res = calc.singlepoint()
    return float(res.get("energy")), np.array(res.get("gradient"))


def test_energy_and_gradient_equal_direct_tblite(acetaminophen):
    region, x = acetaminophen
    term = make_term(region)
    out = term.energy_forces(x, box_nm=np.eye(3) * 3.0)  # the box is ignored (vacuum)
    e_ref, g_ref = _direct(region, x)
    # same library, same settings, same start guess: equal to round-off (1e-8 relative is
    # far tighter than the SCF tolerance, so a unit or sign slip cannot hide in it)
    assert out.energy / HARTREE_KJMOL == pytest.approx(e_ref, rel=1e-8)
    np.testing.assert_allclose(
        -out.region_forces / HARTREE_PER_BOHR_TO_KJMOL_PER_NM, g_ref, rtol=1e-8, atol=1e-10
    )
    # isolated term: no external force or torque, forces sum to zero (to the gradient's
    # numerical accuracy, ~1e-6 hartree/bohr ~ 0.05 kJ/mol/nm)
    assert np.abs(out.region_forces.sum(axis=0)).max() < 0.1
    # extras: Mulliken charges sum to the net charge; timing recorded
    q = out.extras["charges"]
    assert q.shape == (region.n_atoms,)
    assert q.sum() == pytest.approx(region.net_charge, abs=1e-6)
    assert out.extras["scf_time_s"] > 0
    assert out.extras["step"] == 1


def test_forces_match_central_finite_differences(acetaminophen):
    """F = -dE/dx by central differences in float64 with h = 1e-5 nm.

    accuracy=1e-4 tightens tblite's SCF (energy convergence ~1e-10 hartree); with the default
    accuracy the SCF noise (~1e-7 hartree) over 2h would alone reach ~1 kJ/mol/nm.
    Tolerance: 0.02 kJ/mol/nm absolute + 1e-5 relative, against forces up to ~3000 kJ/mol/nm.
    """
    region, x = acetaminophen
    term = make_term(region, accuracy=1e-4)
    forces = term.energy_forces(x).region_forces
    h = 1e-5
    fd = np.zeros_like(x)
    for i in range(region.n_atoms):
        for k in range(3):
            y = x.copy()
            y[i, k] += h
            e_plus = term.energy_forces(y).energy
            y[i, k] -= 2 * h
            e_minus = term.energy_forces(y).energy
            fd[i, k] = -(e_plus - e_minus) / (2 * h)
    np.testing.assert_allclose(forces, fd, rtol=1e-5, atol=0.02)


def test_wavefunction_reuse_same_energy_and_timing(acetaminophen):
    """Restarting from the previous wavefunction gives the fresh-start energy to SCF tolerance.

    Timing is printed (run with -s to see it), not asserted: the machine is shared.
    """
    region, x0 = acetaminophen
    rng = np.random.default_rng(1)
    # a short "trajectory": MD-like displacements of ~1e-3 nm per step
    frames = [x0]
    for _ in range(15):
        frames.append(frames[-1] + rng.normal(scale=1e-3, size=x0.shape))

    reused = make_term(region)
    t0 = time.perf_counter()
    e_reused = [reused.energy_forces(f).energy for f in frames]
    t_reused = (time.perf_counter() - t0) / len(frames)

    fresh = make_term(region)
    t0 = time.perf_counter()
    e_fresh = []
    for f in frames:
        fresh.reset_wavefunction()
        e_fresh.append(fresh.energy_forces(f).energy)
    t_fresh = (time.perf_counter() - t0) / len(frames)

    t0 = time.perf_counter()
    e_direct = [_direct(region, f)[0] * HARTREE_KJMOL for f in frames]
    t_direct = (time.perf_counter() - t0) / len(frames)

    # SCF tolerance at accuracy 1: energy converged to ~1e-6 hartree = 2.6e-3 kJ/mol
    np.testing.assert_allclose(e_reused, e_fresh, rtol=0, atol=2.6e-3)
    np.testing.assert_allclose(e_reused, e_direct, rtol=0, atol=2.6e-3)
    print(
        f"\nGFN2-xTB, {region.n_atoms}-atom acetaminophen, ms per call: "
        f"reused wavefunction {1e3 * t_reused:.1f}, fresh guess (same calculator) "
        f"{1e3 * t_fresh:.1f}, new tblite Calculator each call {1e3 * t_direct:.1f}"
    )


# SiH4 at the geometry (bohr) of the example in tblite's own documentation: the docstring of
# tblite.interface.Result (python/tblite/interface.py, tblite 0.8.0) prints, for GFN2-xTB with
# default settings, res.get("energy") == -3.7632337506836944 hartree after an SCF converged
# to a density error of 1.1e-7.
SIH4_NUMBERS = (14, 1, 1, 1, 1)
SIH4_BOHR = np.array(
    [
        [0.000000000000, 0.000000000000, 0.000000000000],
        [1.617683897558, 1.617683897558, -1.617683897558],
        [-1.617683897558, -1.617683897558, -1.617683897558],
        [1.617683897558, -1.617683897558, 1.617683897558],
        [-1.617683897558, 1.617683897558, 1.617683897558],
    ]
)
SIH4_GFN2_HARTREE = -3.7632337506836944


def test_reference_energy_sih4_from_tblite_documentation():
    region = RegionInfo(("Si", "H", "H", "H", "H"), SIH4_NUMBERS, 0)
    term = build_term("xtb", region, {})  # the route the region force takes
    out = term.energy_forces(SIH4_BOHR * BOHR_NM)
    # 1e-6 hartree: the threshold tblite's own tests use for total energies
    assert out.energy / HARTREE_KJMOL == pytest.approx(SIH4_GFN2_HARTREE, abs=1e-6)
    # tetrahedral and symmetric: the net force on Si vanishes by symmetry
    assert np.abs(out.region_forces[0]).max() < 1e-6


def test_content_declares_physics():
    region = RegionInfo(("O", "H", "H"), (8, 1, 1), 0)
    term = make_term(region)
    c = term.content
    assert c.reference == "GFN2-xTB"
    assert c.dispersion == "included"
    assert c.net_charges is None
    assert {"H", "C", "N", "O", "Rn"} <= c.elements and "Fr" not in c.elements
    d = term.describe()
    assert d["name"] == "gfn2" and d["max_iterations"] == 250


def test_unknown_option_rejected():
    region = RegionInfo(("O", "H", "H"), (8, 1, 1), 0)
    with pytest.raises(OptionError, match="unknown option.*max_iter"):
        make_term(region, max_iter=10)
    with pytest.raises(OptionError, match="electronic_temperature_k"):
        make_term(region, electronic_temperature_k=-5.0)
    with pytest.raises(OptionError, match="max_iterations"):
        make_term(region, max_iterations=2.5)


def test_odd_electron_count_is_refused():
    # CH3 radical: 9 electrons
    region = RegionInfo(("C", "H", "H", "H"), (6, 1, 1, 1), 0)
    with pytest.raises(DomainError, match="unpaired electron.*uhf"):
        make_term(region)
    # the same atoms as a cation are closed shell and accepted
    make_term(RegionInfo(("C", "H", "H", "H"), (6, 1, 1, 1), 1))


def test_element_beyond_radon_is_refused():
    region = RegionInfo(("Fr", "H"), (87, 1), 0)
    with pytest.raises(DomainError, match="Z = 1-86"):
        make_term(region)


def test_scf_failure_raises_with_step_and_advice(acetaminophen):
    """tblite raises TBLiteRuntimeError('SCF not converged in 1 cycles') with max-iter 1
    (checked by hand for tblite 0.8.0); the term turns it into SCFConvergenceError."""
    region, x = acetaminophen
    term = make_term(region, max_iterations=1)
    with pytest.raises(SCFConvergenceError, match=r"step 1 .*smaller MD timestep.*max_iterations"):
        term.energy_forces(x)
    with pytest.raises(SCFConvergenceError, match=r"failed at step 2 ") as info:
        term.energy_forces(x)
    assert "electronic_temperature_k" in str(info.value)
    assert isinstance(info.value.__cause__, Exception)  # the library error is chained


def test_wrong_shape_rejected(acetaminophen):
    region, x = acetaminophen
    term = make_term(region)
    with pytest.raises(ValueError, match="shape"):
        term.energy_forces(x[:-1])
