"""QEq layer: the constrained minimum, its invariants, its forces, the switch and periodicity.

Independent routes: the two-atom closed form, scipy's constrained minimiser, central finite
differences of the energy (float64), an explicit vacuum placement of the nearest images.
"""
import math

import numpy as np
import pytest
from rdkit import Chem
from rdkit.Chem import AllChem
from scipy.optimize import minimize

from mlbridge import units
from mlbridge.errors import DomainError, OptionError
from mlbridge.terms.base import RegionInfo
from mlbridge.terms.qeq import (
    EV_KJMOL,
    make_term,
    shielded_coulomb,
    solve_qeq,
    switch,
)

TIP3P_Q = (-0.834, 0.417, 0.417)
MODES = ["anchored", "rappe-goddard"]


def _molecule(smiles, seed=7):
    """RDKit ETKDG (seeded) + MMFF geometry in nm, Gasteiger charges summing exactly to Q."""
    mol = Chem.AddHs(Chem.MolFromSmiles(smiles))
    params = AllChem.ETKDGv3()
    params.randomSeed = seed
    assert AllChem.EmbedMolecule(mol, params) == 0
    AllChem.MMFFOptimizeMolecule(mol)
    AllChem.ComputeGasteigerCharges(mol)
    q = np.array([a.GetDoubleProp("_GasteigerCharge") for a in mol.GetAtoms()])
    net = Chem.GetFormalCharge(mol)
    q += (net - q.sum()) / len(q)
    x = mol.GetConformer().GetPositions() * units.ANGSTROM_NM
    x -= x.mean(axis=0)
    symbols = tuple(a.GetSymbol() for a in mol.GetAtoms())
    numbers = tuple(a.GetAtomicNum() for a in mol.GetAtoms())
    bonds = tuple((b.GetBeginAtomIdx(), b.GetEndAtomIdx()) for b in mol.GetBonds())
    return symbols, numbers, net, tuple(q), bonds, x


def _water(centre, rng):
    """TIP3P geometry (O-H 0.09572 nm, 104.52 deg) with a random orientation, O first."""
    half = math.radians(104.52) / 2
    local = np.array([[0, 0, 0], [math.sin(half), math.cos(half), 0], [-math.sin(half), math.cos(half), 0]])
    local *= 0.09572
    local -= local.mean(axis=0)
    rot, _ = np.linalg.qr(rng.normal(size=(3, 3)))
    return centre + local @ rot.T


def _waters_around(x_region, distances, seed=3):
    """Waters whose geometric centres lie at the given distances from the region centre."""
    rng = np.random.default_rng(seed)
    out = []
    for d in distances:
        for _ in range(1000):
            v = rng.normal(size=3)
            w = _water(x_region.mean(axis=0) + d * v / np.linalg.norm(v), rng)
            near_region = np.min(np.linalg.norm(w[:, None] - x_region[None], axis=2))
            near_water = min(
                [np.min(np.linalg.norm(w[:, None] - o[None], axis=2)) for o in out], default=1.0
            )
            if near_region > 0.2 and near_water > 0.25:
                out.append(w)
                break
        else:
            raise RuntimeError("could not place a water")
    return np.concatenate(out)


def _region(smiles, n_waters=0, charges_zero=False, seed=7):
    symbols, numbers, net, q, bonds, x = _molecule(smiles, seed)
    qe = (0.0, 0.0, 0.0) if charges_zero else TIP3P_Q
    return (
        RegionInfo(
            symbols=symbols,
            atomic_numbers=numbers,
            net_charge=net,
            classical_charges=q,
            bonds=bonds,
            environment_charges=qe * n_waters,
            environment_molecules=tuple(np.repeat(np.arange(n_waters), 3) + 100),
        ),
        x,
    )


ACETAMINOPHEN = "CC(=O)Nc1ccc(O)cc1"
ACETATE = "CC(=O)[O-]"
METHYLAMMONIUM = "C[NH3+]"
# Distances of water centres from the region centre (nm): near, mid, and three in the switch.
DISTANCES = [0.45, 0.55, 0.7, 0.85, 1.02, 1.08, 1.15]


@pytest.fixture(scope="module")
def solvated():
    region, x = _region(ACETAMINOPHEN, n_waters=len(DISTANCES))
    y = _waters_around(x, DISTANCES)
    return region, x, y


def _lagrangian(term, x, box, y, q):
    h = term.hardness_matrix(x)
    chi = term.electronegativity(x)
    phi = term.environment_potential(x, box, y)
    return (chi + phi) @ q + 0.5 * q @ h @ q


# ---- the constrained minimum -------------------------------------------------------------


@pytest.mark.parametrize("mode", MODES)
@pytest.mark.parametrize("smiles", [ACETAMINOPHEN, ACETATE, METHYLAMMONIUM])
def test_charges_sum_to_net_charge(mode, smiles):
    region, x = _region(smiles, n_waters=4)
    y = _waters_around(x, [0.4, 0.5, 0.6, 0.7])
    res = make_term(region, mode=mode).energy_forces(x, None, y)
    q_net = region.net_charge
    assert abs(res.extras["charges"].sum() - q_net) < 1e-10
    assert abs(res.extras["charges_vacuum"].sum() - q_net) < 1e-10
    assert region.net_charge in (-1, 0, 1)


@pytest.mark.parametrize("mode", MODES)
def test_chemical_potentials_equal(solvated, mode):
    region, x, y = solvated
    term = make_term(region, mode=mode)
    q = term.energy_forces(x, None, y).extras["charges"]
    mu = term.electronegativity(x) + term.environment_potential(x, None, y) + term.hardness_matrix(x) @ q
    # kJ/mol/e; mu itself is O(1e3): equal to rounding of the linear solve
    assert np.ptp(mu) < 1e-8 * max(1.0, np.abs(mu).max())


def test_two_atom_closed_form():
    """Neutral A-B: q_A = (chi_B - chi_A) / (J_A + J_B - 2 gamma_AB)."""
    region = RegionInfo(symbols=("C", "O"), atomic_numbers=(6, 8), net_charge=0)
    x = np.array([[0.0, 0.0, 0.0], [0.1128, 0.0, 0.0]])
    term = make_term(region, mode="rappe-goddard")
    q = term.energy_forces(x).extras["charges_vacuum"]
    chi_c, chi_o = 5.343 * EV_KJMOL, 8.741 * EV_KJMOL
    j_c, j_o = 10.126 * EV_KJMOL, 13.364 * EV_KJMOL
    s_c, s_o = (units.COULOMB_KJMOL_NM * math.sqrt(2 / math.pi) / j for j in (j_c, j_o))
    gamma = units.COULOMB_KJMOL_NM * math.erf(0.1128 / math.hypot(s_c, s_o)) / 0.1128
    q_c = (chi_o - chi_c) / (j_c + j_o - 2 * gamma)
    assert q[0] == pytest.approx(q_c, rel=1e-12)
    assert q[1] == pytest.approx(-q_c, rel=1e-12)
    assert q_c > 0  # C is less electronegative than O in the 1991 table


@pytest.mark.parametrize("mode", MODES)
def test_scipy_constrained_minimum(solvated, mode):
    region, x, y = solvated
    term = make_term(region, mode=mode)
    res = term.energy_forces(x, None, y)
    h = term.hardness_matrix(x)
    for phi, q_ours in [
        (term.environment_potential(x, None, y), res.extras["charges"]),
        (np.zeros(len(x)), res.extras["charges_vacuum"]),
    ]:
        b = term.electronegativity(x) + phi
        opt = minimize(
            lambda q: b @ q + 0.5 * q @ h @ q,
            np.full(len(x), region.net_charge / len(x)),
            jac=lambda q: b + h @ q,
            method="SLSQP",
            constraints=[{"type": "eq", "fun": lambda q: q.sum() - region.net_charge,
                          "jac": lambda q: np.ones_like(q)}],
            options={"ftol": 1e-14, "maxiter": 1000},
        )
        assert opt.success
        # SLSQP converges to ~1e-7 e here; our solve is exact to rounding
        np.testing.assert_allclose(q_ours, opt.x, atol=1e-6)


def test_anchored_reproduces_classical_charges_in_vacuum(solvated):
    region, x, y = solvated
    res = make_term(region, mode="anchored").energy_forces(x, None, y)
    np.testing.assert_allclose(res.extras["charges_vacuum"], region.classical_charges, atol=1e-10)
    # and the field polarises them
    assert np.abs(res.extras["charges"] - res.extras["charges_vacuum"]).max() > 1e-3


def test_anchored_is_mechanical_embedding_plus_polarisation(solvated):
    """U = sum q0 phi - 1/2 phi P phi <= sum q0 phi (P is positive semi-definite)."""
    region, x, y = solvated
    term = make_term(region, mode="anchored")
    res = term.energy_forces(x, None, y)
    mech = float(np.dot(region.classical_charges, term.environment_potential(x, None, y)))
    assert res.energy < mech
    assert res.energy == pytest.approx(mech, rel=0.5)  # a correction, not a different number


@pytest.mark.parametrize("mode", MODES)
def test_zero_without_environment(mode):
    region, x = _region(ACETAMINOPHEN)
    res = make_term(region, mode=mode).energy_forces(x, None, None)
    assert res.energy == 0.0
    assert np.abs(res.region_forces).max() < 1e-9
    assert res.environment_forces is None
    np.testing.assert_allclose(res.extras["charges"], res.extras["charges_vacuum"], atol=1e-14)


@pytest.mark.parametrize("mode", MODES)
def test_zero_with_uncharged_environment(mode):
    region, x = _region(ACETAMINOPHEN, n_waters=3, charges_zero=True)
    y = _waters_around(x, [0.4, 0.5, 0.6])
    res = make_term(region, mode=mode).energy_forces(x, np.eye(3) * 3.0, y)
    assert res.energy == 0.0
    assert np.abs(res.region_forces).max() < 1e-9
    assert np.abs(res.environment_forces).max() == 0.0


def test_symmetric_atoms_get_equal_charges():
    # exact tetrahedral methane and C2v water (vacuum)
    r = 0.109
    t = r / math.sqrt(3)
    ch4 = np.array([[0, 0, 0], [t, t, t], [t, -t, -t], [-t, t, -t], [-t, -t, t]])
    region = RegionInfo(symbols=("C", "H", "H", "H", "H"), atomic_numbers=(6, 1, 1, 1, 1), net_charge=0)
    q = make_term(region, mode="rappe-goddard").energy_forces(ch4).extras["charges_vacuum"]
    assert np.ptp(q[1:]) < 1e-12
    assert q[0] < 0 < q[1]  # chi_C > chi_H
    half = math.radians(104.52) / 2
    h2o = 0.09572 * np.array([[0, 0, 0], [math.sin(half), math.cos(half), 0], [-math.sin(half), math.cos(half), 0]])
    region = RegionInfo(symbols=("O", "H", "H"), atomic_numbers=(8, 1, 1), net_charge=0)
    q = make_term(region, mode="rappe-goddard").energy_forces(h2o).extras["charges_vacuum"]
    assert abs(q[1] - q[2]) < 1e-12
    assert q[0] < 0


# ---- forces --------------------------------------------------------------------------------


def _fd_forces(term, x, box, y, h=1e-5):
    """Central differences of the energy (float64, step 1e-5 nm = 1e-4 angstrom)."""
    def energy(xx, yy):
        return term.energy_forces(xx, box, yy).energy

    fx = np.zeros_like(x)
    for idx in np.ndindex(x.shape):
        xp, xm = x.copy(), x.copy()
        xp[idx] += h
        xm[idx] -= h
        fx[idx] = -(energy(xp, y) - energy(xm, y)) / (2 * h)
    fy = np.zeros_like(y)
    for idx in np.ndindex(y.shape):
        yp, ym = y.copy(), y.copy()
        yp[idx] += h
        ym[idx] -= h
        fy[idx] = -(energy(x, yp) - energy(x, ym)) / (2 * h)
    return fx, fy


@pytest.mark.parametrize("mode", MODES)
@pytest.mark.parametrize("periodic", [False, True])
def test_forces_match_finite_differences(solvated, mode, periodic):
    region, x, y = solvated
    box = np.diag([2.9, 3.1, 3.0]) if periodic else None
    term = make_term(region, mode=mode)
    res = term.energy_forces(x, box, y)
    assert res.extras["n_molecules_in_cutoff"] == len(DISTANCES)
    fx, fy = _fd_forces(term, x, box, y)
    scale = max(np.abs(res.region_forces).max(), np.abs(res.environment_forces).max())
    assert scale > 10.0  # kJ/mol/nm: the test has forces worth checking
    # FD truncation (h^2 f''') and rounding (1e-16 E / h) are both ~1e-7 of the scale
    np.testing.assert_allclose(res.region_forces, fx, atol=1e-6 * scale)
    np.testing.assert_allclose(res.environment_forces, fy, atol=1e-6 * scale)
    # Newton's third law for the whole system (no external field)
    total = res.region_forces.sum(axis=0) + res.environment_forces.sum(axis=0)
    assert np.abs(total).max() < 1e-9 * scale


def test_switch_is_c2():
    d = np.array([0.999999, 1.0, 1.1, 1.2, 1.200001])
    s, ds = switch(d, 1.0, 1.2)
    assert s[0] == 1.0 and s[1] == 1.0 and s[-1] == 0.0 and s[-2] == 0.0
    assert s[2] == pytest.approx(0.5)
    assert ds[1] == 0.0 and ds[3] == 0.0
    h = 1e-6
    for x0 in (1.03, 1.1, 1.17):
        fd = (switch(x0 + h, 1.0, 1.2)[0] - switch(x0 - h, 1.0, 1.2)[0]) / (2 * h)
        assert fd == pytest.approx(switch(x0, 1.0, 1.2)[1], rel=1e-7)


def test_shielded_coulomb_limits():
    g, dg = shielded_coulomb(np.array([5.0]), 0.1)
    assert g[0] == pytest.approx(units.COULOMB_KJMOL_NM / 5.0, rel=1e-12)  # bare Coulomb far out
    g, _ = shielded_coulomb(np.array([1e-7]), 0.1)
    assert g[0] == pytest.approx(units.COULOMB_KJMOL_NM * 2 / math.sqrt(math.pi) / 0.1, rel=1e-9)


@pytest.mark.parametrize("mode", MODES)
def test_continuous_and_zero_across_cutoff(mode):
    """One TIP3P water moved radially through the switch and past the cutoff."""
    region, x = _region(ACETAMINOPHEN, n_waters=1)
    term = make_term(region, mode=mode, cutoff_nm=1.2, switch_width_nm=0.2)
    rng = np.random.default_rng(11)
    w0 = _water(np.zeros(3), rng)
    direction = np.array([0.3, -0.5, 0.8]) / np.linalg.norm([0.3, -0.5, 0.8])
    ds = np.linspace(0.9, 1.3, 401)  # step 1e-3 nm
    e, f = [], []
    for d in ds:
        res = term.energy_forces(x, None, w0 + x.mean(axis=0) + d * direction)
        e.append(res.energy)
        f.append(np.concatenate([res.region_forces, res.environment_forces]))
    e, f = np.array(e), np.array(f)
    outside = ds >= 1.2
    assert np.all(e[outside] == 0.0) and np.all(f[outside] == 0.0)
    assert abs(e[0]) > 0.05  # kJ/mol: the water matters before the switch
    # continuity: no jump larger than |dE/dd| * step allows (with 20 % slack)
    slope = np.abs(np.gradient(e, ds)).max()
    assert np.abs(np.diff(e)).max() < 1.2 * slope * (ds[1] - ds[0])
    assert np.abs(np.diff(f, axis=0)).max() < 0.05 * np.abs(f).max()
    # approaching the cutoff from inside: energy and force go to zero (S ~ t^3 near r_c)
    res = term.energy_forces(x, None, w0 + x.mean(axis=0) + (1.2 - 1e-4) * direction)
    assert abs(res.energy) < 1e-8
    assert np.abs(res.region_forces).max() < 1e-4 and np.abs(res.environment_forces).max() < 1e-4


# ---- periodic boundaries ---------------------------------------------------------------------

# OpenMM's reduced form of a truncated octahedron with image distance 3.2 nm.
_D = 3.2
TRUNC_OCT = np.array([[_D, 0, 0], [_D / 3, 2 * math.sqrt(2) * _D / 3, 0],
                      [-_D / 3, math.sqrt(2) * _D / 3, math.sqrt(6) * _D / 3]])
BOXES = {"orthorhombic": np.diag([2.9, 3.1, 3.0]), "truncated-octahedron": TRUNC_OCT,
         "triclinic": np.array([[3.0, 0, 0], [0.9, 2.9, 0], [-0.7, 1.1, 2.8]])}


@pytest.mark.parametrize("box_name", list(BOXES))
@pytest.mark.parametrize("mode", MODES)
def test_periodic_images(solvated, box_name, mode):
    region, x, y = solvated
    box = BOXES[box_name]
    term = make_term(region, mode=mode)
    ref = term.energy_forces(x, None, y)  # nearest images placed explicitly, in vacuum
    rng = np.random.default_rng(5)
    n_mol = len(y) // 3
    shifted = y.copy()
    for m in range(n_mol):  # each molecule by a different lattice vector
        shifted[3 * m:3 * m + 3] += rng.integers(-2, 3, size=3) @ box
    shifted[1] += box[0]  # and one atom alone: the molecule is split across the boundary
    shifted[-1] -= box[2] + box[1]
    res = term.energy_forces(x, box, shifted)
    assert res.energy == pytest.approx(ref.energy, abs=1e-10)
    np.testing.assert_allclose(res.region_forces, ref.region_forces, atol=1e-9)
    np.testing.assert_allclose(res.environment_forces, ref.environment_forces, atol=1e-9)
    # shifting the region by a box vector changes nothing either
    res2 = term.energy_forces(x + box[1] - box[2], box, shifted)
    assert res2.energy == pytest.approx(ref.energy, abs=1e-10)


def test_cutoff_larger_than_half_box_is_refused(solvated):
    region, x, y = solvated
    with pytest.raises(DomainError, match="half the smallest box width"):
        make_term(region).energy_forces(x, np.eye(3) * 2.0, y)


# ---- options -------------------------------------------------------------------------------


def test_options_are_checked():
    region, _ = _region(ACETAMINOPHEN)
    with pytest.raises(OptionError, match="cutof"):
        make_term(region, cutof_nm=1.0)
    with pytest.raises(OptionError, match="mode"):
        make_term(region, mode="eem")
    with pytest.raises(OptionError, match="switch_width_nm"):
        make_term(region, switch_width_nm=0.0)
    bad = RegionInfo(symbols=("C", "Br"), atomic_numbers=(6, 35), net_charge=0, classical_charges=(0.1, -0.1))
    with pytest.raises(DomainError, match="Br"):
        make_term(bad)
    no_q = RegionInfo(symbols=("C", "O"), atomic_numbers=(6, 8), net_charge=0)
    with pytest.raises(DomainError, match="classical charge"):
        make_term(no_q, mode="anchored")
    openmm_unit = pytest.importorskip("openmm.unit")
    term = make_term(region, cutoff_nm=10.0 * openmm_unit.angstrom)
    assert term.cutoff_nm == pytest.approx(1.0)


def test_hardness_matrix_positive_definite(solvated):
    region, x, _ = solvated
    h = make_term(region).hardness_matrix(x)
    assert np.linalg.eigvalsh(h).min() > 0
    np.testing.assert_allclose(np.diag(h), [
        {"H": 13.8904, "C": 10.126, "N": 11.760, "O": 13.364}[s] * EV_KJMOL for s in region.symbols
    ])


def test_solve_qeq_multiple_right_hand_sides():
    h = np.array([[10.0, 2.0, 1.0], [2.0, 8.0, 3.0], [1.0, 3.0, 12.0]])
    chi = np.array([[1.0, 0.0], [2.0, 1.0], [-1.0, 3.0]])
    q, mu = solve_qeq(chi, h, 1.0)
    for k in range(2):
        qk, muk = solve_qeq(chi[:, k], h, 1.0)
        np.testing.assert_allclose(q[:, k], qk, atol=1e-14)
        np.testing.assert_allclose(chi[:, k] + h @ q[:, k], muk, atol=1e-12)


def test_ions_and_unordered_molecules():
    """Molecules of different sizes (TIP3P waters, Na+, Cl-) with atoms in no particular order:
    forces by finite differences in a triclinic box, and the same numbers as the ordered input."""
    symbols, numbers, net, q, bonds, x = _molecule(ACETAMINOPHEN)
    waters = _waters_around(x, [0.5, 0.75, 1.1])
    centre = x.mean(axis=0)
    ions = centre + np.array([[0.0, 0.62, 0.0], [0.0, 0.0, -1.12]])  # Na+ in, Cl- in the switch
    y = np.concatenate([waters, ions])
    qe = np.array(TIP3P_Q * 3 + (1.0, -1.0))
    mol = np.array([0, 0, 0, 1, 1, 1, 2, 2, 2, 7, 5])
    perm = np.random.default_rng(2).permutation(len(y))
    box = BOXES["triclinic"]
    results = []
    for order in (np.arange(len(y)), perm):
        region = RegionInfo(symbols=symbols, atomic_numbers=numbers, net_charge=net,
                            classical_charges=q, environment_charges=tuple(qe[order]),
                            environment_molecules=tuple(mol[order]))
        term = make_term(region, mode="anchored")
        yy = y[order] + np.random.default_rng(4).integers(-1, 2, size=(len(y), 1)) * box[2]
        res = term.energy_forces(x, box, yy)
        fe = np.empty_like(res.environment_forces)
        fe[order] = res.environment_forces
        results.append((res.energy, res.region_forces, fe))
        assert res.extras["n_molecules_in_cutoff"] == 5
    assert results[1][0] == pytest.approx(results[0][0], abs=1e-10)
    np.testing.assert_allclose(results[1][1], results[0][1], atol=1e-9)
    np.testing.assert_allclose(results[1][2], results[0][2], atol=1e-9)
    fx, fy = _fd_forces(term, x, box, yy)
    scale = np.abs(res.region_forces).max()
    np.testing.assert_allclose(res.region_forces, fx, atol=1e-6 * scale)
    np.testing.assert_allclose(res.environment_forces, fy, atol=1e-6 * scale)
