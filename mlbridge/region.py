"""The region: which atoms, removing their internal classical terms, unwrapping across PBC.

Mechanical embedding (DESIGN.md section 3): U = U_MM - U_MM^RR + U_region + U_layer.
:func:`remove_region_internal` takes U_MM^RR out of a classical System exactly:

* bonds, angles, proper and improper torsions whose atoms all lie in R get zero force constants;
* every R-R pair of the NonbondedForce becomes an exception with zero chargeProd and epsilon, so
  OpenMM removes its direct and its PME reciprocal-space part (exceptions are subtracted from the
  reciprocal sum);
* exceptions use periodic boundary conditions, so the subtracted reciprocal part of an excluded
  pair is evaluated at its minimum-image distance even when the region arrives wrapped;
* region-environment LJ and fixed-charge Coulomb stay; :func:`zero_region_charges` removes the
  latter where the QEq layer replaces it (LJ kept).

Constraints are kinematic and are kept (X-H bonds of the region stay rigid if built so).
"""
from __future__ import annotations

import functools

from collections import deque
from itertools import combinations
from typing import Iterable, Sequence

import numpy as np
import openmm
import openmm.unit as unit

from .errors import PreparedSystemError


def _in(region: set, *atoms) -> bool:
    return all(a in region for a in atoms)


def remove_region_internal(system: openmm.System, region: Sequence[int]) -> dict:
    """Remove the region-internal classical terms from ``system`` in place.

    Returns counts of what was removed, for the metadata.
    """
    R = set(int(i) for i in region)
    counts = {"bonds": 0, "angles": 0, "torsions": 0, "nonbonded_pairs": 0}
    for force in system.getForces():
        if isinstance(force, openmm.HarmonicBondForce):
            for k in range(force.getNumBonds()):
                i, j, r0, kb = force.getBondParameters(k)
                if _in(R, i, j):
                    force.setBondParameters(k, i, j, r0, 0.0)
                    counts["bonds"] += 1
        elif isinstance(force, openmm.HarmonicAngleForce):
            for k in range(force.getNumAngles()):
                i, j, l, th0, ka = force.getAngleParameters(k)
                if _in(R, i, j, l):
                    force.setAngleParameters(k, i, j, l, th0, 0.0)
                    counts["angles"] += 1
        elif isinstance(force, openmm.PeriodicTorsionForce):
            for k in range(force.getNumTorsions()):
                i, j, l, m, n, ph, kt = force.getTorsionParameters(k)
                if _in(R, i, j, l, m):
                    force.setTorsionParameters(k, i, j, l, m, n, ph, 0.0)
                    counts["torsions"] += 1
        elif isinstance(force, openmm.NonbondedForce):
            existing = {}
            for k in range(force.getNumExceptions()):
                i, j, *_ = force.getExceptionParameters(k)
                existing[(min(i, j), max(i, j))] = k
            for i, j in combinations(sorted(R), 2):
                k = existing.get((i, j))
                if k is None:
                    force.addException(i, j, 0.0, 1.0, 0.0)
                else:
                    force.setExceptionParameters(k, i, j, 0.0, 1.0, 0.0)
                counts["nonbonded_pairs"] += 1
            if force.usesPeriodicBoundaryConditions():
                # PME subtracts the excluded pairs' reciprocal part at the exception's distance;
                # with minimum-image exceptions that stays right when region atoms arrive wrapped.
                force.setExceptionsUsePeriodicBoundaryConditions(True)
        elif isinstance(force, (openmm.CustomBondForce, openmm.CustomTorsionForce, openmm.CMAPTorsionForce,
                                openmm.RBTorsionForce, openmm.CustomNonbondedForce, openmm.CustomAngleForce,
                                openmm.CustomCompoundBondForce)):
            # prepared systems (CHARMM: Urey-Bradley, impropers, CMAP; GROMACS: RB torsions)
            counts.setdefault(type(force).__name__, 0)
            counts[type(force).__name__] += _zero_custom(force, R)
    return counts


def _zero_custom(force, R: set) -> int:
    """Zero region-internal entries of the bonded force kinds prepared systems use."""
    n = 0
    if isinstance(force, openmm.RBTorsionForce):
        for k in range(force.getNumTorsions()):
            p = force.getTorsionParameters(k)
            if _in(R, *p[:4]):
                force.setTorsionParameters(k, *p[:4], 0, 0, 0, 0, 0, 0)
                n += 1
    elif isinstance(force, openmm.CustomTorsionForce):
        for k in range(force.getNumTorsions()):
            i, j, l, m, par = force.getTorsionParameters(k)
            if _in(R, i, j, l, m):
                _scale_custom(force, "setTorsionParameters", k, (i, j, l, m), par)
                n += 1
    elif isinstance(force, openmm.CustomBondForce):
        for k in range(force.getNumBonds()):
            i, j, par = force.getBondParameters(k)
            if _in(R, i, j):
                _scale_custom(force, "setBondParameters", k, (i, j), par)
                n += 1
    elif isinstance(force, openmm.CustomAngleForce):
        for k in range(force.getNumAngles()):
            i, j, l, par = force.getAngleParameters(k)
            if _in(R, i, j, l):
                _scale_custom(force, "setAngleParameters", k, (i, j, l), par)
                n += 1
    elif isinstance(force, openmm.CMAPTorsionForce):
        for k in range(force.getNumTorsions()):
            m, *atoms = force.getTorsionParameters(k)
            if _in(R, *atoms):
                raise PreparedSystemError(
                    "the region has CMAP terms (a peptide backbone); mlbridge's region is meant for "
                    "small molecules without CMAP. Select a ligand residue instead."
                )
    elif isinstance(force, (openmm.CustomNonbondedForce, openmm.CustomCompoundBondForce)):
        raise PreparedSystemError(
            f"the system has a {type(force).__name__} (e.g. NBFIX or a custom potential); mlbridge "
            "cannot remove its region-internal part exactly. Rebuild the system without it."
        )
    return n


def _scale_custom(force, setter: str, k: int, atoms: tuple, par) -> None:
    """Custom bonded forces: zero the parameter named like a force constant (k, K, kb, ...)."""
    names = [force.getPerBondParameterName(p) if hasattr(force, "getPerBondParameterName") else
             force.getPerTorsionParameterName(p) if hasattr(force, "getPerTorsionParameterName") else
             force.getPerAngleParameterName(p) for p in range(len(par))]
    new = list(par)
    hit = False
    for p, name in enumerate(names):
        if name.lower().startswith("k"):
            new[p] = 0.0
            hit = True
    if not hit:
        raise PreparedSystemError(
            f"cannot find a force-constant parameter among {names} of {type(force).__name__} "
            f"'{force.getEnergyFunction()}'; mlbridge cannot remove its region-internal terms."
        )
    getattr(force, setter)(k, *atoms, new)


def zero_region_charges(system: openmm.System, region: Sequence[int]) -> None:
    """Set the region's charges to zero in the NonbondedForce (LJ kept): QEq replaces them.

    Region-internal exceptions are already zero after :func:`remove_region_internal`.
    """
    for force in system.getForces():
        if isinstance(force, openmm.NonbondedForce):
            for i in region:
                q, sig, eps = force.getParticleParameters(int(i))
                force.setParticleParameters(int(i), 0.0, sig, eps)


def bond_tree(n_atoms: int, bonds: Iterable) -> tuple:
    """Breadth-first spanning forest of the region's bond graph as (parent, child) pairs.

    Unwrapping child after parent by minimum image makes every bonded neighbour whole.
    """
    nbrs = [[] for _ in range(n_atoms)]
    for i, j in bonds:
        nbrs[i].append(j)
        nbrs[j].append(i)
    seen = [False] * n_atoms
    order = []
    for root in range(n_atoms):
        if seen[root]:
            continue
        seen[root] = True
        q = deque([root])
        while q:
            a = q.popleft()
            for b in nbrs[a]:
                if not seen[b]:
                    seen[b] = True
                    order.append((a, b))
                    q.append(b)
    return tuple(order)


def minimum_image(d: np.ndarray, box: np.ndarray) -> np.ndarray:
    """Minimum-image displacement(s) for a box in OpenMM's reduced triclinic form (rows a, b, c)."""
    d = np.array(d, dtype=float, copy=True)
    d -= np.round(d[..., 2:3] / box[2, 2]) * box[2]
    d -= np.round(d[..., 1:2] / box[1, 1]) * box[1]
    d -= np.round(d[..., 0:1] / box[0, 0]) * box[0]
    return d


def unwrap(positions: np.ndarray, tree: tuple, box) -> np.ndarray:
    """Make the region whole: place each child atom at the minimum image of its parent.

    Equivalent to walking the tree (child = parent + minimum_image(child - parent), parents
    first) but vectorised: all bond vectors are imaged at once and each atom is its tree root
    plus the sum of the imaged bond vectors on its path (the reduction is invariant to lattice
    shifts of the parent, so both give the same positions).
    """
    x = np.array(positions, dtype=float, copy=True)
    if box is None or not tree:
        return x
    roots, paths, parents, children = _tree_paths(len(x), tuple(tree))
    bonds = minimum_image(x[children] - x[parents], np.asarray(box, dtype=float))
    return x[roots] + paths @ bonds


@functools.lru_cache(maxsize=64)
def _tree_paths(n_atoms: int, tree: tuple):
    """Per atom: its tree root and the 0/1 row of tree edges on the path root -> atom."""
    roots = np.arange(n_atoms)
    paths = np.zeros((n_atoms, len(tree)))
    for e, (parent, child) in enumerate(tree):  # breadth-first: a parent's row is complete
        paths[child] = paths[parent]
        paths[child, e] = 1.0
        roots[child] = roots[parent]
    parents = np.array([p for p, _ in tree], dtype=np.int64)
    children = np.array([c for _, c in tree], dtype=np.int64)
    for a in (roots, paths, parents, children):
        a.setflags(write=False)
    return roots, paths, parents, children


def region_bonds_from_topology(topology, region: Sequence[int]) -> tuple:
    """Bonds among region atoms, in region-local indices, from an OpenMM Topology."""
    local = {int(a): k for k, a in enumerate(region)}
    out = []
    for b in topology.bonds():
        i, j = b[0].index, b[1].index
        if i in local and j in local:
            out.append((local[i], local[j]))
    return tuple(out)


def positions_nm(q) -> np.ndarray:
    """Positions as a plain (N, 3) float array in nm from a Quantity or array."""
    if unit.is_quantity(q):
        q = q.value_in_unit(unit.nanometer)
    return np.asarray(q, dtype=float).reshape(-1, 3)
