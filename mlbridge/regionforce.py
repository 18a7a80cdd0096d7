"""How region terms reach OpenMM: ``openmm.PythonForce`` callables, one term per force group.

:class:`RegionTermForce` is the callable a PythonForce calls with the State. It

1. takes the positions of the particles the force applies to (region first, then, for terms that
   feel the environment, every environment atom) in nm;
2. makes the region whole through its bond graph by minimum image (positions may arrive wrapped);
3. calls the term's ``energy_forces`` and hands energy (kJ/mol) and forces (kJ/mol/nm) back;
4. records the time spent and the term's extras (ensemble spread, charges) in a per-process
   ledger keyed by the force's id, so reporters can read them without holding the object.

Overlap with the classical forces
---------------------------------
OpenMM evaluates a System's forces one after the other, in the order they were added, and
releases Python's global lock while its own kernels run. Each term therefore has two forces in
the same force group:

- a *start* force (:class:`RegionTermStart`), placed before every classical force, whose call
  hands the positions to one background worker thread and returns zero energy and forces at
  once;
- the *result* force (:class:`RegionTermForce`, the last forces of the System), whose call waits
  for the worker's result for those same positions.

So the region terms run on one core while OpenMM computes the classical forces (PME, bonded)
with its threads; the step costs about max(classical, terms) instead of their sum. The result
force checks that the positions it gets are the ones the worker evaluated, and evaluates on the
spot if they are not (or if nothing was started), so a wrong pairing can only cost time, never
give a wrong force. Torch runs one intra-op thread: the worker sets that when it starts
(``torch.set_num_threads(1)``, a per-process setting).
Set ``MLBRIDGE_SERIAL_TERMS=1`` (or call :func:`set_overlap`) to evaluate every term inside its
result force instead, e.g. to time the terms without overlap.

The callables pickle only their spec (term module, options, region description), so a System
that holds them serializes with ``XmlSerializer``; the term is rebuilt on first use after
unpickling, and the start and result forces of one term find each other by the term's id.
"""
from __future__ import annotations

import os
import threading
import time
import uuid
import weakref
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import Optional

import numpy as np
import openmm

from .region import unwrap
from .terms.base import RegionInfo, RegionTerm, build_term

#: first force group used by region terms; the classical forces stay in group 0
FIRST_TERM_GROUP = 1

#: force-name prefixes of the result and start forces
RESULT_PREFIX = "mlbridge:"
START_PREFIX = "mlbridge-start:"

_OVERLAP = os.environ.get("MLBRIDGE_SERIAL_TERMS", "").strip().lower() in ("", "0", "no", "false")


def set_overlap(enabled: bool) -> bool:
    """Run region terms beside the classical forces (True, the default) or inside their result
    force (False). Returns the previous setting. Applies to every region force in this process."""
    global _OVERLAP
    previous, _OVERLAP = _OVERLAP, bool(enabled)
    return previous


def overlap_enabled() -> bool:
    return _OVERLAP


@dataclass
class TermLedger:
    """Running statistics of one region term in this process.

    ``seconds`` is the time spent evaluating the term (in the worker or inline), ``wait_seconds``
    the time result forces spent waiting for the worker, ``overlapped`` how many evaluations ran
    beside the classical forces.
    """

    name: str
    calls: int = 0
    seconds: float = 0.0
    wait_seconds: float = 0.0
    overlapped: int = 0
    last_energy: float = float("nan")
    last_extras: dict = field(default_factory=dict)

    def reset(self) -> None:
        self.calls, self.seconds, self.wait_seconds, self.overlapped = 0, 0.0, 0.0, 0

    @property
    def ms_per_call(self) -> float:
        return 1000.0 * self.seconds / self.calls if self.calls else float("nan")

    @property
    def wait_ms_per_call(self) -> float:
        return 1000.0 * self.wait_seconds / self.calls if self.calls else float("nan")


_LEDGERS: dict = {}


def ledger(key: str) -> TermLedger:
    """The ledger of the region term with id ``key`` (created on first use)."""
    return _LEDGERS.setdefault(key, TermLedger(name=key))


_EXECUTOR: Optional[ThreadPoolExecutor] = None
_EXECUTOR_LOCK = threading.Lock()


def _worker_init() -> None:
    """Pin torch to one intra-op thread (a per-process setting) when the worker starts: beside
    OpenMM's own threads a torch pool competes for the same cores (on 2 cores single ANI calls
    were measured up to 60x slower that way)."""
    try:
        import torch
    except ImportError:  # pragma: no cover - torch is a dependency
        return
    torch.set_num_threads(1)


def _executor() -> ThreadPoolExecutor:
    """The one worker thread of this process (terms queue up in the order they are started)."""
    global _EXECUTOR
    if _EXECUTOR is None:
        with _EXECUTOR_LOCK:
            if _EXECUTOR is None:
                _EXECUTOR = ThreadPoolExecutor(max_workers=1, thread_name_prefix="mlbridge-region",
                                               initializer=_worker_init)
    return _EXECUTOR


def _forget_executor() -> None:  # a forked child does not inherit the worker thread
    global _EXECUTOR
    _EXECUTOR = None


if hasattr(os, "register_at_fork"):
    os.register_at_fork(after_in_child=_forget_executor)

#: the evaluator of each term id in this process (start and result forces share it)
_EVALUATORS: "weakref.WeakValueDictionary[str, RegionTermForce]" = weakref.WeakValueDictionary()

_LAST_UNWRAP = threading.local()  # per thread: the last (positions, box, tree) and its result


def _unwrapped(xr: np.ndarray, tree: tuple, box: Optional[np.ndarray]) -> np.ndarray:
    """unwrap(xr, tree, box), reusing the previous result for identical input in this thread.

    The terms of one step see the same region positions; the first unwraps them, the others
    (D3, QEq after ANI) get the same read-only array. Equality is checked bit for bit, so a
    cached result is only ever the exact result for these inputs.
    """
    last = getattr(_LAST_UNWRAP, "entry", None)
    if last is not None and last[2] == tree and _same_input(last[0], last[1], xr, box):
        return last[3]
    out = unwrap(xr, tree, box)
    out.setflags(write=False)
    _LAST_UNWRAP.entry = (xr.copy(), None if box is None else box.copy(), tree, out)
    return out


@dataclass
class _Pending:
    positions: np.ndarray
    box: Optional[np.ndarray]
    future: Future


class RegionTermForce:
    """Callable for the result ``openmm.PythonForce`` of one region term (module docstring).

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
        self._pending: Optional[_Pending] = None
        self._peer: Optional[RegionTermForce] = None

    # pickling: the spec only; the term (torch modules, library handles) is rebuilt lazily
    def __getstate__(self):
        return {k: v for k, v in self.__dict__.items() if k not in ("_term", "_pending", "_peer")}

    def __setstate__(self, state):
        self.__dict__.update(state)
        self._term = None
        self._pending = None
        self._peer = None

    @property
    def term(self) -> RegionTerm:
        if self._term is None:
            self._term = build_term(self.module, self.region, self.options)
            ledger(self.key).name = self._term.name
        return self._term

    def shared(self) -> "RegionTermForce":
        """The one evaluator of this term id in this process (copies made by pickling, e.g. the
        start and result forces after ``XmlSerializer``, all resolve to the same object)."""
        if self._peer is None:
            peer = _EVALUATORS.get(self.key)
            if peer is None:
                _EVALUATORS[self.key] = self
                peer = self
            self._peer = peer
        return self._peer

    def evaluate(self, positions_nm: np.ndarray, box_nm: Optional[np.ndarray]):
        """Energy (kJ/mol) and forces (kJ/mol/nm) on this force's particles; also for tests."""
        n_r = self.region.n_atoms
        xr = _unwrapped(positions_nm[:n_r], self.tree, box_nm)
        env = positions_nm[n_r:] if self.uses_environment else None
        result = self.term.energy_forces(xr, box_nm, env)
        if self.uses_environment:
            forces = np.empty_like(positions_nm)
            forces[:n_r] = result.region_forces
            forces[n_r:] = result.environment_forces if result.environment_forces is not None else 0.0
        else:
            forces = result.region_forces
        return result, forces

    def _timed(self, positions_nm, box_nm):
        t0 = time.perf_counter()
        out = self.evaluate(positions_nm, box_nm)
        book = ledger(self.key)
        book.calls += 1
        book.seconds += time.perf_counter() - t0
        return out

    def _read(self, state):
        pos = np.array(state.getPositions(asNumpy=True)._value, dtype=float)
        box = (np.array(state.getPeriodicBoxVectors(asNumpy=True)._value, dtype=float)
               if self.tree or self.uses_environment else None)
        return pos, box

    def start(self, state) -> None:
        """Hand this State's positions to the worker thread (called by the start force)."""
        pos, box = self._read(state)
        stale, self._pending = self._pending, _Pending(pos, box, _executor().submit(self._timed, pos, box))
        if stale is not None:  # started twice without a result call: let the old one finish
            _quiet_wait(stale.future)

    def __call__(self, state):
        me = self.shared()
        pos, box = me._read(state)
        pending, me._pending = me._pending, None
        book = ledger(me.key)
        out = None
        if pending is not None:
            t0 = time.perf_counter()
            if _same_input(pending.positions, pending.box, pos, box):
                try:
                    out = pending.future.result()  # re-raises the term's own error
                finally:
                    book.wait_seconds += time.perf_counter() - t0
                book.overlapped += 1
            else:
                _quiet_wait(pending.future)
                book.wait_seconds += time.perf_counter() - t0
        if out is None:
            out = me._timed(pos, box)
        result, forces = out
        book.last_energy = result.energy
        book.last_extras = result.extras
        return result.energy, forces


def _same_input(pos_a, box_a, pos_b, box_b) -> bool:
    """Positions and box (either may be None) equal bit for bit."""
    if not np.array_equal(pos_a, pos_b):
        return False
    return (box_a is None and box_b is None) or (
        box_a is not None and box_b is not None and np.array_equal(box_a, box_b))


def _quiet_wait(future: Future) -> None:
    try:
        future.result()
    except Exception:  # the result for other positions is discarded, its error too
        pass


class RegionTermStart:
    """Callable for the start ``openmm.PythonForce`` of a region term: starts the evaluation
    in the worker thread and returns zero energy and forces (module docstring)."""

    def __init__(self, target: RegionTermForce, n_particles: int):
        self.target = target
        self.n_particles = int(n_particles)
        self._zeros = None

    def __getstate__(self):
        return {"target": self.target, "n_particles": self.n_particles}

    def __setstate__(self, state):
        self.__dict__.update(state)
        self._zeros = None

    def __call__(self, state):
        if _OVERLAP:
            self.target.shared().start(state)
        if self._zeros is None:
            self._zeros = np.zeros((self.n_particles, 3))
        return 0.0, self._zeros


def add_region_forces(system: openmm.System, terms: list, region: tuple, environment: tuple,
                      periodic: bool) -> list:
    """Add the start and result PythonForces of each ``(callable_, group)`` in ``terms`` to
    ``system`` (region atoms, and environment atoms for terms that feel them).

    The start forces come first, in the order of ``terms``, then the forces already in
    ``system`` (re-added in their order), then the result forces. Returns the result forces.
    """
    kept = [openmm.XmlSerializer.clone(system.getForce(k)) for k in range(system.getNumForces())]
    for k in reversed(range(system.getNumForces())):
        system.removeForce(k)
    results = []
    for callable_, group in terms:
        callable_.shared()  # this object (with its term already built) evaluates for both forces
        particles = list(region) + (list(environment) if callable_.uses_environment else [])
        pair = []
        for cb, prefix in ((RegionTermStart(callable_, len(particles)), START_PREFIX),
                           (callable_, RESULT_PREFIX)):
            f = openmm.PythonForce(cb)
            f.setParticles(particles)
            f.setUsesPeriodicBoundaryConditions(bool(periodic))
            f.setForceGroup(int(group))
            f.setName(f"{prefix}{callable_.module}:{callable_.key}")
            pair.append(f)
        system.addForce(pair[0])
        results.append(pair[1])
    for f in kept:
        system.addForce(f)
    for f in results:
        system.addForce(f)
    return results


def is_region_force(force: openmm.Force) -> bool:
    """Whether ``force`` is one of mlbridge's region forces (start or result)."""
    name = force.getName()
    return name.startswith(RESULT_PREFIX) or name.startswith(START_PREFIX)


def region_forces(system: openmm.System) -> list:
    """(force group, module, ledger key) of every mlbridge region term in ``system``."""
    out = []
    for f in system.getForces():
        name = f.getName()
        if name.startswith(RESULT_PREFIX):
            _, module, key = name.split(":", 2)
            out.append((f.getForceGroup(), module, key))
    return out
