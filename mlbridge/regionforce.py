"""How region terms reach OpenMM: one ``openmm.PythonForce`` per term, each in its own force group.

:class:`RegionTermForce` is the callable a PythonForce calls with the State. It

1. takes the positions of the particles the force applies to (region first, then, for terms that
   feel the environment, every environment atom) in nm;
2. makes the region whole through its bond graph by minimum image (positions may arrive wrapped);
3. calls the term's ``energy_forces`` and hands energy (kJ/mol) and forces (kJ/mol/nm) back;
4. records the time spent and the term's extras (ensemble spread, charges) in a per-process
   ledger keyed by the force's id, so reporters can read them without holding the object.

The callable pickles only its spec (term module, options, region description), so a System that
holds it serializes with ``XmlSerializer``; the term is rebuilt on first use after unpickling.
"""
from __future__ import annotations

import time
import uuid
from dataclasses import dataclass, field
from typing import Optional

import numpy as np
import openmm

from .region import unwrap
from .terms.base import RegionInfo, RegionTerm, build_term

#: first force group used by region terms; the classical forces stay in group 0
FIRST_TERM_GROUP = 1


@dataclass
class TermLedger:
    """Running statistics of one region force in this process."""

    name: str
    calls: int = 0
    seconds: float = 0.0
    last_energy: float = float("nan")
    last_extras: dict = field(default_factory=dict)

    def reset(self) -> None:
        self.calls, self.seconds = 0, 0.0

    @property
    def ms_per_call(self) -> float:
        return 1000.0 * self.seconds / self.calls if self.calls else float("nan")


_LEDGERS: dict = {}


def ledger(key: str) -> TermLedger:
    """The ledger of the region force with id ``key`` (created on first use)."""
    return _LEDGERS.setdefault(key, TermLedger(name=key))


class RegionTermForce:
    """Callable for ``openmm.PythonForce``: one region term on whole-molecule coordinates.

    Parameters
    ----------
    module : str, term module in :mod:`mlbridge.terms` (``ani``, ``d3``, ``qeq``, ``xtb``)
    options : dict, keyword options of the term's ``make_term``
    region : RegionInfo
    tree : tuple of (parent, child), the region's bond spanning forest (local indices)
    uses_environment : bool, the force also applies to the environment atoms (QEq)
    """

    def __init__(self, module: str, options: dict, region: RegionInfo, tree: tuple,
                 uses_environment: bool = False, key: Optional[str] = None):
        self.module = module
        self.options = dict(options)
        self.region = region
        self.tree = tuple(tree)
        self.uses_environment = bool(uses_environment)
        self.key = key or f"{module}-{uuid.uuid4().hex[:8]}"
        self._term: Optional[RegionTerm] = None

    # pickling: the spec only; the term (torch modules, library handles) is rebuilt lazily
    def __getstate__(self):
        return {k: v for k, v in self.__dict__.items() if k != "_term"}

    def __setstate__(self, state):
        self.__dict__.update(state)
        self._term = None

    @property
    def term(self) -> RegionTerm:
        if self._term is None:
            self._term = build_term(self.module, self.region, self.options)
            ledger(self.key).name = self._term.name
        return self._term

    def evaluate(self, positions_nm: np.ndarray, box_nm: Optional[np.ndarray]):
        """Energy (kJ/mol) and forces (kJ/mol/nm) on this force's particles; also for tests."""
        n_r = self.region.n_atoms
        xr = unwrap(positions_nm[:n_r], self.tree, box_nm)
        env = positions_nm[n_r:] if self.uses_environment else None
        result = self.term.energy_forces(xr, box_nm, env)
        if self.uses_environment:
            forces = np.empty_like(positions_nm)
            forces[:n_r] = result.region_forces
            forces[n_r:] = result.environment_forces if result.environment_forces is not None else 0.0
        else:
            forces = result.region_forces
        return result, forces

    def __call__(self, state):
        t0 = time.perf_counter()
        pos = state.getPositions(asNumpy=True)._value
        box = state.getPeriodicBoxVectors(asNumpy=True)._value if self.tree or self.uses_environment else None
        result, forces = self.evaluate(np.asarray(pos), None if box is None else np.asarray(box))
        book = ledger(self.key)
        book.calls += 1
        book.seconds += time.perf_counter() - t0
        book.last_energy = result.energy
        book.last_extras = result.extras
        return result.energy, forces


def add_region_force(system: openmm.System, callable_: RegionTermForce, region: tuple,
                     environment: tuple, group: int, periodic: bool) -> openmm.PythonForce:
    """Add one PythonForce for ``callable_`` to ``system`` on the region (and environment) atoms."""
    force = openmm.PythonForce(callable_)
    particles = list(region) + (list(environment) if callable_.uses_environment else [])
    force.setParticles(particles)
    force.setUsesPeriodicBoundaryConditions(bool(periodic))
    force.setForceGroup(group)
    force.setName(f"mlbridge:{callable_.module}:{callable_.key}")
    system.addForce(force)
    return force


def region_forces(system: openmm.System) -> list:
    """(force group, module, ledger key) of every mlbridge region force in ``system``."""
    out = []
    for f in system.getForces():
        name = f.getName()
        if name.startswith("mlbridge:"):
            _, module, key = name.split(":", 2)
            out.append((f.getForceGroup(), module, key))
    return out
