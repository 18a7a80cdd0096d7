"""How region terms reach OpenMM: the start/result force pair, the worker thread, serialization,
the vectorised unwrap and the QEq molecule list.

References outside the code under test: the same energies and forces evaluated in series (no
worker thread), the tree walk written out atom by atom, and a QEq term without a list (skin 0:
every molecule re-examined at every call).
"""
from types import SimpleNamespace

import numpy as np
import openmm
import pytest

from conftest import context_energy_forces, cpu_or_reference_context
from mlbridge.build import apply_treatment, region_info
from mlbridge.errors import DomainError
from mlbridge.region import bond_tree, minimum_image, unwrap
from mlbridge.regionforce import (
    RESULT_PREFIX,
    START_PREFIX,
    RegionTermForce,
    _unwrapped,
    ledger,
    overlap_enabled,
    region_forces,
    set_overlap,
)
from mlbridge.terms.qeq import make_term as make_qeq


class FakeState:
    """What a PythonForce hands its callable, reduced to the two calls the callables make."""

    def __init__(self, pos, box):
        self.pos, self.box = np.asarray(pos, float), np.asarray(box, float)

    def getPositions(self, asNumpy=True):
        return SimpleNamespace(_value=self.pos)

    def getPeriodicBoxVectors(self, asNumpy=True):
        return SimpleNamespace(_value=self.box)


@pytest.fixture
def serial():
    """Run a test body with the region terms evaluated in series, then restore the setting."""
    previous = set_overlap(False)
    yield
    set_overlap(previous)


def _cpu_state(system, positions, groups=None):
    return context_energy_forces(cpu_or_reference_context(system, "CPU"), positions, groups)


@pytest.fixture(scope="module")
def layered(solvated):
    """ml+d3+qeq with ANI in float64, so serial and overlapped runs can be compared tightly."""
    return apply_treatment(solvated, "ml+d3+qeq", term_options={"ani": {"precision": "float64"}})


def test_start_forces_come_first_and_result_forces_last(layered):
    names = [f.getName() for f in layered.system.getForces()]
    modules = [t["module"] for t in layered.metadata["terms"]]
    k = len(modules)
    assert [n.split(":")[1] for n in names[:k]] == modules
    assert all(n.startswith(START_PREFIX) for n in names[:k])
    assert all(n.startswith(RESULT_PREFIX) for n in names[-k:])
    assert [n.split(":")[1] for n in names[-k:]] == modules
    assert not any(n.startswith(("mlbridge", START_PREFIX)) for n in names[k:-k])
    forces = layered.system.getForces()
    for start, result in zip(forces[:k], forces[-k:]):
        assert start.getForceGroup() == result.getForceGroup()
        assert start.getName().split(":", 1)[1] == result.getName().split(":", 1)[1]
        assert list(start.getParticles()) == list(result.getParticles())


def test_overlapped_equals_serial(layered):
    """Each region term's energy and forces (its own force group) are the same with and without
    the worker thread. (The whole-system energy is compared loosely: OpenMM's CPU platform sums
    the classical part in an order that varies between evaluations.)"""
    assert overlap_enabled()
    keys = [key for _g, _m, key in region_forces(layered.system)]
    groups = sorted(g for g in layered.force_groups if g > 0)

    def evaluate():
        return {g: _cpu_state(layered.system, layered.positions, {g}) for g in groups}, \
            _cpu_state(layered.system, layered.positions)[0]

    before = {k: ledger(k).overlapped for k in keys}
    overlapped, total1 = evaluate()
    assert all(ledger(k).overlapped > before[k] for k in keys)  # each term ran in the worker
    previous = set_overlap(False)
    try:
        before = {k: ledger(k).overlapped for k in keys}
        serial, total2 = evaluate()
        assert all(ledger(k).overlapped == before[k] for k in keys)
    finally:
        set_overlap(previous)
    for g in groups:
        assert overlapped[g][0] == pytest.approx(serial[g][0], abs=1e-9)
        np.testing.assert_allclose(overlapped[g][1], serial[g][1], atol=1e-9)
    assert total1 == pytest.approx(total2, abs=1e-3)


def test_serialized_system_pairs_start_and_result(layered):
    copy = openmm.XmlSerializer.deserialize(openmm.XmlSerializer.serialize(layered.system))
    for g in sorted(g for g in layered.force_groups if g > 0):
        e1, f1 = _cpu_state(layered.system, layered.positions, {g})
        e2, f2 = _cpu_state(copy, layered.positions, {g})
        assert e1 == pytest.approx(e2, abs=1e-9)
        np.testing.assert_allclose(f1, f2, atol=1e-9)


def _d3_callable(solvated):
    info = region_info(solvated, with_environment=False)
    return RegionTermForce("d3", {}, info, bond_tree(info.n_atoms, info.bonds))


def test_result_for_other_positions_is_recomputed(solvated):
    """A start for positions A followed by a result call for B must give B's forces."""
    cb = _d3_callable(solvated)
    box = solvated.box_vectors_nm()
    xa = np.asarray(solvated.positions)[list(solvated.region)]
    xb = xa + np.random.default_rng(2).normal(scale=0.01, size=xa.shape)
    ref_b = cb.evaluate(xb, box)[0]
    book = ledger(cb.key)
    cb.start(FakeState(xa, box))
    n_over = book.overlapped
    energy, forces = cb(FakeState(xb, box))
    assert book.overlapped == n_over
    assert energy == pytest.approx(ref_b.energy, abs=1e-12)
    np.testing.assert_allclose(forces, ref_b.region_forces, atol=1e-12)
    cb.start(FakeState(xa, box))  # and the matching pair uses the worker's result
    energy, _ = cb(FakeState(xa, box))
    assert book.overlapped == n_over + 1
    assert energy == pytest.approx(cb.evaluate(xa, box)[0].energy, abs=1e-12)


def test_worker_error_reaches_the_result_call(solvated, monkeypatch):
    cb = _d3_callable(solvated)
    box = solvated.box_vectors_nm()
    x = np.asarray(solvated.positions)[list(solvated.region)]

    def broken(*_a, **_k):
        raise DomainError("term failed on purpose")

    monkeypatch.setattr(cb.term, "energy_forces", broken)
    cb.start(FakeState(x, box))
    with pytest.raises(DomainError, match="on purpose"):
        cb(FakeState(x, box))


def test_serial_setting_evaluates_in_the_result_force(solvated, serial):
    cb = _d3_callable(solvated)
    from mlbridge.regionforce import RegionTermStart
    box = solvated.box_vectors_nm()
    x = np.asarray(solvated.positions)[list(solvated.region)]
    energy0, zeros = RegionTermStart(cb, len(x))(FakeState(x, box))
    assert energy0 == 0.0 and not zeros.any()
    assert cb._pending is None  # nothing was started
    energy, _ = cb(FakeState(x, box))
    assert energy == pytest.approx(cb.evaluate(x, box)[0].energy, abs=1e-12)


def _walk(x, tree, box):
    """The tree walk written out: each child at the minimum image of its (already placed) parent."""
    x = np.array(x, float)
    for parent, child in tree:
        x[child] = x[parent] + minimum_image(x[child] - x[parent], box)
    return x


@pytest.mark.parametrize("box", [np.diag([2.1, 2.3, 2.2]),
                                 np.array([[2.5, 0, 0], [0.8, 2.4, 0], [-0.7, 0.9, 2.2]])])
def test_vectorised_unwrap_equals_the_tree_walk(box):
    rng = np.random.default_rng(4)
    n = 20
    bonds = [(i, i + 1) for i in range(14)] + [(3, 15), (15, 16), (7, 17), (17, 18), (10, 19)]
    tree = bond_tree(n, bonds)
    for _ in range(50):
        steps = rng.normal(size=(n, 3))
        steps *= 0.15 / np.linalg.norm(steps, axis=1)[:, None]
        x = np.zeros((n, 3))
        for parent, child in tree:
            x[child] = x[parent] + steps[child]
        x += rng.uniform(-3, 3, size=3)
        wrapped = x - np.floor(x @ np.linalg.inv(box)) @ box  # every atom into the cell
        got = unwrap(wrapped, tree, box)
        np.testing.assert_allclose(got, _walk(wrapped, tree, box), atol=1e-12)
        lengths = np.linalg.norm(got[[c for _, c in tree]] - got[[p for p, _ in tree]], axis=1)
        np.testing.assert_allclose(lengths, 0.15, atol=1e-12)


def test_shared_unwrap_is_exact_for_each_input():
    # the terms of one step share one unwrap; any change of positions, box or tree recomputes
    tree = bond_tree(4, [(0, 1), (1, 2), (2, 3)])
    box = np.eye(3) * 2.0
    x = np.cumsum(np.full((4, 3), 0.12), axis=0) + 1.9  # crosses the boundary
    x_wrapped = x % 2.0
    first = _unwrapped(x_wrapped, tree, box)
    assert _unwrapped(x_wrapped.copy(), tree, box) is first  # same bits: reused
    np.testing.assert_allclose(first, unwrap(x_wrapped, tree, box), atol=0)
    with pytest.raises(ValueError):
        first[0, 0] = 0.0  # read-only: a term cannot alter what the next term gets
    moved = x_wrapped.copy()
    moved[2, 1] += 1e-12
    np.testing.assert_array_equal(_unwrapped(moved, tree, box), unwrap(moved, tree, box))
    other_box = np.eye(3) * 2.5
    np.testing.assert_array_equal(_unwrapped(x_wrapped, tree, other_box), unwrap(x_wrapped, tree, other_box))
    np.testing.assert_array_equal(_unwrapped(x_wrapped, tree, None), x_wrapped)
    other_tree = bond_tree(4, [(0, 1), (0, 2), (0, 3)])
    np.testing.assert_array_equal(_unwrapped(x_wrapped, other_tree, box), unwrap(x_wrapped, other_tree, box))


def test_qeq_molecule_list_changes_nothing(solvated):
    """Along a trajectory with list rebuilds and a re-wrap of every water into the box, the
    listed term gives the energies and forces of a term that re-examines every molecule."""
    info = region_info(solvated, with_environment=True)
    region = list(solvated.region)
    rset = set(region)
    env = [i for i in range(solvated.n_atoms) if i not in rset]
    box = solvated.box_vectors_nm()
    x = np.asarray(solvated.positions)[region].copy()
    y = np.asarray(solvated.positions)[env].copy()
    listed = make_qeq(info, skin_nm=0.2)
    rng = np.random.default_rng(11)
    frames = 14
    for k in range(frames):
        y += rng.normal(scale=0.004, size=y.shape)
        x += np.array([0.006, -0.004, 0.003])
        if k == 7:
            y -= np.floor(y @ np.linalg.inv(box)) @ box
        a = listed.energy_forces(x, box, y)
        b = make_qeq(info, skin_nm=0.0).energy_forces(x, box, y)
        assert a.energy == pytest.approx(b.energy, rel=1e-10, abs=1e-9)
        scale = np.abs(b.environment_forces).max()
        np.testing.assert_allclose(a.region_forces, b.region_forces, atol=1e-9 * scale)
        np.testing.assert_allclose(a.environment_forces, b.environment_forces, atol=1e-9 * scale)
        assert a.extras["n_molecules_in_cutoff"] == b.extras["n_molecules_in_cutoff"]
    assert 2 <= listed.list_builds < frames  # rebuilt (the re-wrap at least), and re-used
