"""The contract every region term follows (ML potential, D3, QEq, xTB).

A term is built once from a :class:`RegionInfo` (what the region is: elements, net charge,
classical charges, bonds) and then evaluated every MD step by the region force with whole-molecule
coordinates of the region:

    result = term.energy_forces(region_nm, box_nm, environment_nm)

=====================  ==========  ==============================================================
argument / field       shape       unit
=====================  ==========  ==============================================================
region_nm              (n_R, 3)    nm, unwrapped across PBC through the bond graph
box_nm                 (3, 3)      nm, periodic box vectors as rows, or None in vacuum
environment_nm         (n_E, 3)    nm, environment positions (only for terms with
                                   ``uses_environment = True``; None otherwise)
result.energy          scalar      kJ/mol
result.region_forces   (n_R, 3)    kJ/mol/nm
result.environment_forces (n_E, 3) kJ/mol/nm, or None
result.extras          dict        term-specific observables (ensemble spread, charges, ...)
=====================  ==========  ==============================================================

Terms must be cheap to construct from their options and need not be picklable: the region
force pickles a *term spec* (module name + options) and rebuilds the term after unpickling.
"""
from __future__ import annotations

import abc
from dataclasses import dataclass, field
from typing import Any, Optional

import numpy as np


@dataclass(frozen=True)
class RegionInfo:
    """What the region is, independent of any potential.

    Attributes
    ----------
    symbols : tuple of str, element symbols in region order
    atomic_numbers : tuple of int
    net_charge : int, elementary charges
    classical_charges : tuple of float, AM1-BCC (or prepared-system) partial charges, e
    bonds : tuple of (int, int), region-local indices
    environment_charges : tuple of float, fixed charges of environment atoms, e (empty in vacuum)
    environment_molecules : tuple of int, molecule id per environment atom (for group cutoffs)
    """

    symbols: tuple
    atomic_numbers: tuple
    net_charge: int
    classical_charges: tuple = ()
    bonds: tuple = ()
    environment_charges: tuple = ()
    environment_molecules: tuple = ()

    @property
    def n_atoms(self) -> int:
        return len(self.symbols)


@dataclass(frozen=True)
class TermContent:
    """What physics a term already contains, so the layer adds only what is missing.

    Attributes
    ----------
    reference : str, the level of theory the term reproduces (e.g. "wB97X/6-31G(d)")
    dispersion : str, "none" or "included"
    electrostatics : str, free text ("short-range, within the AEV cutoff", "self-consistent", ...)
    elements : frozenset of str, element symbols the term supports
    net_charges : tuple of int or None, supported net charges (None = any)
    cutoff_nm : float or None, interaction cutoff of the term
    """

    reference: str
    dispersion: str
    electrostatics: str
    elements: frozenset
    net_charges: Optional[tuple] = (0,)
    cutoff_nm: Optional[float] = None


@dataclass
class TermResult:
    """Energy (kJ/mol) and forces (kJ/mol/nm) of one term at one geometry."""

    energy: float
    region_forces: np.ndarray
    environment_forces: Optional[np.ndarray] = None
    extras: dict = field(default_factory=dict)


class RegionTerm(abc.ABC):
    """Base class of all region terms. See the module docstring for shapes and units."""

    #: short name used in reports and force names, e.g. "ani1x", "d3bj", "qeq", "gfn2"
    name: str = "term"
    #: what the term contains
    content: TermContent
    #: whether energy_forces needs environment positions (QEq does, ML terms do not)
    uses_environment: bool = False

    @abc.abstractmethod
    def energy_forces(
        self,
        region_nm: np.ndarray,
        box_nm: Optional[np.ndarray] = None,
        environment_nm: Optional[np.ndarray] = None,
    ) -> TermResult:
        """Energy and forces of the term at the given region (and environment) coordinates."""

    def describe(self) -> dict[str, Any]:
        """Plain-data description for reports (name, reference, dispersion, elements, ...)."""
        c = self.content
        return {
            "name": self.name,
            "reference": c.reference,
            "dispersion": c.dispersion,
            "electrostatics": c.electrostatics,
            "elements": sorted(c.elements),
            "net_charges": None if c.net_charges is None else list(c.net_charges),
            "cutoff_nm": c.cutoff_nm,
        }


def build_term(module: str, region: RegionInfo, options: dict) -> RegionTerm:
    """Build a term from its spec: ``mlbridge.terms.<module>.make_term(region, **options)``.

    Every term module exposes ``make_term(region: RegionInfo, **options) -> RegionTerm``; the
    region force stores only (module, options) so that a System holding it pickles.
    """
    import importlib

    mod = importlib.import_module(f"mlbridge.terms.{module}")
    return mod.make_term(region, **options)
