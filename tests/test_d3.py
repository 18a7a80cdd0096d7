"""D3(BJ) region term against an independent implementation (torch-dftd) and a printed value.

- torch-dftd (a PyTorch re-implementation of Grimme's D3 with its own reference tables),
  float64, cutoffs far beyond the molecules so the vacuum sums are complete, ATM off.
- The s-dftd3 documentation's PBE0-D3(BJ) energy of the S66 water...N-methylacetamide dimer.
"""
import numpy as np
import pytest
from rdkit import Chem
from rdkit.Chem import AllChem

from mlbridge import units
from mlbridge.errors import OptionError, TreatmentError
from mlbridge.terms.base import RegionInfo, TermContent
from mlbridge.terms.d3 import D3BJParams, make_term, require_missing_dispersion

# S66 system 4, water...peptide (N-methylacetamide) dimer (Rezac, Riley, Hobza, JCTC 7, 2427
# (2011)), angstrom, exactly as given in the s-dftd3 documentation, dftd3/simple-dftd3,
# doc/tutorial/first-steps-cli.rst ("Computing interaction energies", dimer.xyz), which prints
# for `s-dftd3 dimer.xyz --bj PBE0`: "Dispersion energy: -8.2944752821052E-03 Eh" (s9 = 0) and
# with --atm: -8.2920550838084E-03 Eh.
S66_WATER_NMA_SYMBOLS = "O H H C H H H C O N H C H H H".split()
S66_WATER_NMA_ANGSTROM = [
    [-3.2939688, 0.4402024, 0.1621802],
    [-3.8134112, 1.2387332, 0.2637577],
    [-2.3770466, 0.7564365, 0.1766203],
    [-0.6611637, -1.4159110, -0.1449409],
    [-0.0112009, -2.2770229, -0.2778563],
    [-1.3421397, -1.3384389, -0.9888061],
    [-1.2741806, -1.5547070, 0.7420675],
    [0.0935684, -0.1178981, -0.0123474],
    [-0.4831471, 0.9573968, 0.1442414],
    [1.4442015, -0.2154008, -0.0769653],
    [1.8451531, -1.1259348, -0.2064804],
    [2.3124436, 0.9365697, 0.0324778],
    [1.6759495, 1.8048701, 0.1672624],
    [2.9780331, 0.8451145, 0.8885706],
    [2.9069093, 1.0659902, -0.8697814],
]
S66_PBE0_D3BJ_HARTREE = -8.2944752821052e-03
S66_PBE0_D3BJ_ATM_HARTREE = -8.2920550838084e-03

_Z = {"H": 1, "C": 6, "N": 7, "O": 8}


def _region(symbols):
    return RegionInfo(symbols=tuple(symbols), atomic_numbers=tuple(_Z[s] for s in symbols), net_charge=0)


def _rdkit(smiles, seed):
    mol = Chem.AddHs(Chem.MolFromSmiles(smiles))
    params = AllChem.ETKDGv3()
    params.randomSeed = seed
    assert AllChem.EmbedMolecule(mol, params) == 0
    AllChem.MMFFOptimizeMolecule(mol)
    return [a.GetSymbol() for a in mol.GetAtoms()], mol.GetConformer().GetPositions()


def _molecules():
    """(name, symbols, positions in angstrom)."""
    out = [
        ("acetaminophen", *_rdkit("CC(=O)Nc1ccc(O)cc1", 42)),
        ("caffeine", *_rdkit("Cn1cnc2c1c(=O)n(C)c(=O)n2C", 7)),
        ("ethanol", *_rdkit("CCO", 3)),
    ]
    # water dimer, a hand-built hydrogen-bonded geometry (O...O 2.91 angstrom)
    out.append((
        "water dimer",
        ["O", "H", "H", "O", "H", "H"],
        np.array([[-1.551, -0.115, 0.0], [-1.934, 0.763, 0.0], [-0.600, 0.041, 0.0],
                  [1.351, 0.111, 0.0], [1.683, -0.367, -0.761], [1.683, -0.367, 0.761]]),
    ))
    out.append(("S66 water-NMA", S66_WATER_NMA_SYMBOLS, np.array(S66_WATER_NMA_ANGSTROM)))
    return out


MOLECULES = _molecules()


def _hartree(energy_kjmol):
    return energy_kjmol / units.HARTREE_KJMOL


def test_s66_water_nma_matches_s_dftd3_documentation():
    x = np.array(S66_WATER_NMA_ANGSTROM) * units.ANGSTROM_NM
    term = make_term(_region(S66_WATER_NMA_SYMBOLS), functional="pbe0")
    assert abs(_hartree(term.energy_forces(x).energy) - S66_PBE0_D3BJ_HARTREE) < 1e-9
    term = make_term(_region(S66_WATER_NMA_SYMBOLS), functional="pbe0", atm=True)
    assert abs(_hartree(term.energy_forces(x).energy) - S66_PBE0_D3BJ_ATM_HARTREE) < 1e-9


@pytest.fixture(scope="module")
def torch_dftd():
    torch = pytest.importorskip("torch")
    pytest.importorskip("ase")
    from ase import Atoms
    from ase.units import Bohr, Hartree
    from torch_dftd.torch_dftd3_calculator import TorchDFTD3Calculator

    torch.set_num_threads(1)

    def evaluate(symbols, angstrom, xc):
        atoms = Atoms(symbols, positions=angstrom)
        atoms.calc = TorchDFTD3Calculator(
            damping="bj", xc=xc, abc=False, dtype=torch.float64,
            cutoff=200.0 * Bohr, cnthr=200.0 * Bohr,  # far beyond any pair: exact vacuum sums
        )
        energy = atoms.get_potential_energy() / Hartree
        gradient = -atoms.get_forces() / (Hartree / Bohr)
        return energy, gradient

    return evaluate


@pytest.mark.parametrize("functional,xc", [("pbe0", "pbe0"), ("b3lyp", "b3-lyp")])
@pytest.mark.parametrize("name,symbols,angstrom", MOLECULES, ids=[m[0] for m in MOLECULES])
def test_agrees_with_torch_dftd(torch_dftd, functional, xc, name, symbols, angstrom):
    e_ref, g_ref = torch_dftd(symbols, angstrom, xc)
    res = make_term(_region(symbols), functional=functional).energy_forces(angstrom * units.ANGSTROM_NM)
    gradient = -res.region_forces / units.HARTREE_PER_BOHR_TO_KJMOL_PER_NM
    # two implementations of one model: seen ~1e-9 Eh and ~1e-10 Eh/bohr
    assert abs(_hartree(res.energy) - e_ref) < 1e-7
    assert np.abs(gradient - g_ref).max() < 1e-6
    assert e_ref < 0


@pytest.mark.parametrize("functional", ["wb97x", "pbe0"])
def test_forces_match_finite_differences(functional):
    _, symbols, angstrom = MOLECULES[0]
    x = angstrom * units.ANGSTROM_NM
    term = make_term(_region(symbols), functional=functional)
    res = term.energy_forces(x)
    h = 1e-5  # nm = 1e-4 angstrom, central differences in float64
    fd = np.zeros_like(x)
    for idx in np.ndindex(x.shape):
        xp, xm = x.copy(), x.copy()
        xp[idx] += h
        xm[idx] -= h
        fd[idx] = -(term.energy_forces(xp).energy - term.energy_forces(xm).energy) / (2 * h)
    scale = np.abs(res.region_forces).max()
    assert scale > 1.0  # kJ/mol/nm
    np.testing.assert_allclose(res.region_forces, fd, atol=1e-6 * scale)
    # an isolated term: no net force
    assert np.abs(res.region_forces.sum(axis=0)).max() < 1e-10 * scale


def test_model_is_reused_between_calls():
    _, symbols, angstrom = MOLECULES[1]
    x = angstrom * units.ANGSTROM_NM
    term = make_term(_region(symbols))
    e1 = term.energy_forces(x).energy
    model = term._model
    e2 = term.energy_forces(x + 0.01).energy  # rigid translation: same energy, updated in place
    assert term._model is model
    assert e2 == pytest.approx(e1, abs=1e-12)
    assert make_term(_region(symbols)).energy_forces(x * 1.02).energy != pytest.approx(e1, abs=1e-6)


def test_wb97x_preset_matches_the_library_table():
    """Our wb97x values (s6=1, s8=0.2641, a1=0, a2=5.4959) equal s-dftd3's table entry."""
    from dftd3.interface import DispersionModel, RationalDampingParam

    for _, symbols, angstrom in MOLECULES:
        x = angstrom * units.ANGSTROM_NM
        ours = _hartree(make_term(_region(symbols)).energy_forces(x).energy)
        model = DispersionModel(np.array([_Z[s] for s in symbols]), x / units.BOHR_NM)
        lib = float(model.get_dispersion(RationalDampingParam(method="wb97x", atm=False), False)["energy"])
        assert ours == pytest.approx(lib, abs=1e-14)
    p = D3BJParams.from_functional("wb97x")
    assert (p.s6, p.s8, p.a1, p.a2, p.s9) == (1.0, 0.2641, 0.0, 5.4959, 0.0)


def test_atm_is_off_by_default_and_switchable():
    _, symbols, angstrom = MOLECULES[1]
    x = angstrom * units.ANGSTROM_NM
    region = _region(symbols)
    e_off = make_term(region).energy_forces(x).energy
    e_on = make_term(region, atm=True).energy_forces(x).energy
    assert abs(_hartree(e_on - e_off)) > 1e-7  # ATM is a small but visible correction
    explicit_off = make_term(region, params={"s8": 0.2641, "a1": 0.0, "a2": 5.4959})
    assert explicit_off.energy_forces(x).energy == pytest.approx(e_off, abs=1e-10)
    explicit_on = make_term(region, params={"s8": 0.2641, "a1": 0.0, "a2": 5.4959, "s9": 1.0})
    assert explicit_on.energy_forces(x).energy == pytest.approx(e_on, abs=1e-10)
    assert make_term(region, functional="pbe0").params.s9 == 0.0


def test_explicit_values_equal_the_table_preset():
    _, symbols, angstrom = MOLECULES[0]
    x = angstrom * units.ANGSTROM_NM
    region = _region(symbols)
    preset = make_term(region, functional="pbe0").energy_forces(x).energy
    values = D3BJParams.from_values(s6=1.0, s8=1.2177, a1=0.4145, a2=4.8593)
    assert make_term(region, params=values).energy_forces(x).energy == pytest.approx(preset, abs=1e-10)


def test_mixing_preset_and_explicit_values_is_refused():
    region = _region(["O", "H", "H"])
    explicit = {"s8": 1.2177, "a1": 0.4145, "a2": 4.8593}
    with pytest.raises(OptionError, match="not both"):
        make_term(region, functional="pbe0", params=explicit)
    with pytest.raises(OptionError, match="not both"):
        make_term(region, params=explicit, atm=True)
    with pytest.raises(OptionError, match="unknown D3"):
        make_term(region, params={**explicit, "a3": 1.0})
    with pytest.raises(OptionError, match="need"):
        make_term(region, params={"s8": 1.0})
    with pytest.raises(OptionError, match="no D3"):
        make_term(region, functional="not-a-functional")
    with pytest.raises(OptionError, match="functionl"):
        make_term(region, functionl="pbe0")
    with pytest.raises(TypeError):  # explicit values are keyword-only
        D3BJParams.from_values(1.0, 1.2177, 0.4145, 4.8593)


def test_content():
    term = make_term(_region(["O", "H", "H"]))
    assert term.content.reference == "D3(BJ)"
    assert term.content.dispersion == "included"
    assert term.uses_environment is False
    assert {"H", "C", "N", "O", "F", "S", "Cl", "Br", "I"} <= term.content.elements


def test_require_missing_dispersion():
    ccx = TermContent(
        reference="CCSD(T)*/CBS", dispersion="included", electrostatics="short-range",
        elements=frozenset("HCNO"),
    )
    with pytest.raises(TreatmentError, match="count dispersion twice.*'ml' with ani1ccx.*ani1x with 'ml\\+d3'"):
        require_missing_dispersion(ccx, "ani1ccx")
    ani1x = TermContent(
        reference="wB97X/6-31G(d)", dispersion="none", electrostatics="short-range",
        elements=frozenset("HCNO"),
    )
    assert require_missing_dispersion(ani1x, "ani1x") is None
